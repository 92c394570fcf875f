"""Orthogonal matching pursuit (Pati, Rezaiifar & Krishnaprasad 1993), batched.

For each row, select the atom most correlated with the current residual and re-fit all
selected atoms by least squares. This implementation works in the correlation domain
with a precomputed Gram matrix and a Cholesky factor grown one row per step (the
"batch" form of Rubinstein, Zibulevsky & Elad, 2008); the per-row loop runs inside the
compiled kernel :func:`._common.orthogonal_pursuit`, whose docstring gives the algebra.
The one matrix product ``X @ atoms.T`` is the cost floor; each step adds about
``(s + 2)·k`` operations per row at ``s`` active atoms.
"""

from __future__ import annotations

import numpy as np

from ._rows import row_energies
from ._common import (SparseCodes, empty_codes, gram_and_correlations, greedy_options,
                      orthogonal_pursuit)

__all__ = ["omp", "omp_width"]


def omp(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    n_nonzero: int,
    tol: float | None = None,
    gram: np.ndarray | None = None,
) -> SparseCodes:
    """Code every row with orthogonal matching pursuit.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
        Validated rows (see :func:`atomline.stages.kernels.coding.code`).
    atoms : ndarray of shape (k, d), same dtype
        Dictionary; atoms need not be unit-norm.
    n_nonzero : int
        Largest number of atoms per row.
    tol : float, optional
        Also stop a row once its squared residual norm is at most ``tol`` times the
        row's squared norm (relative residual energy). ``None`` uses ``n_nonzero`` only.
    gram : ndarray of shape (k, k), optional
        ``atoms @ atoms.T`` if the caller already has it (it is reused across chunks).

    Returns
    -------
    SparseCodes
        Width ``min(n_nonzero, k)``; slots in the order atoms were selected.
    """
    return _pursue(X, atoms, n_nonzero, tol, gram, order_recursive=False)


def omp_width(n_atoms: int, *, n_nonzero: int, **_: object) -> int:
    """Slots per row of :func:`omp` (``min(n_nonzero, n_atoms)``)."""
    return greedy_options(n_atoms, n_nonzero, None)[0]


def _pursue(X, atoms, n_nonzero, tol, gram, order_recursive: bool) -> SparseCodes:
    """Shared driver of OMP and ORMP: the floor product, then the compiled kernel."""
    k = atoms.shape[0]
    S, tol = greedy_options(k, n_nonzero, tol)
    G, C = gram_and_correlations(X, atoms, gram)  # C: the floor product
    xnorm = row_energies(X)
    n = X.shape[0]
    index, value, count = empty_codes(n, S, X.dtype)
    orthogonal_pursuit(C, G, xnorm, X.dtype.type(tol), order_recursive, index, value, count)
    return SparseCodes(index, value, count, k)
