"""Order-recursive matching pursuit (ORMP; Cotter, Adler, Rao & Kreutz-Delgado 1999).

Also known as orthogonal least squares. Like OMP, but each step picks the atom whose
*orthogonal update* lowers the residual most: ``argmax alpha_j² / ‖P⊥ w_j‖²`` where
``P⊥ w_j`` is atom j's part orthogonal to the active atoms. The denominators are kept
up to date with one extra pass per step (see :func:`._common.orthogonal_pursuit`), so
ORMP costs little more than OMP and is never less accurate per step.
"""

from __future__ import annotations

import numpy as np

from ._common import SparseCodes
from .omp import _pursue, omp_width

__all__ = ["ormp", "ormp_width"]

ormp_width = omp_width


def ormp(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    n_nonzero: int,
    tol: float | None = None,
    gram: np.ndarray | None = None,
) -> SparseCodes:
    """Code every row with order-recursive matching pursuit.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
    n_nonzero : int
        Largest number of atoms per row.
    tol : float, optional
        Stop a row once its squared residual is at most ``tol · ‖x‖²``.
    gram : ndarray of shape (k, k), optional
        ``atoms @ atoms.T``, reused across chunks.

    Returns
    -------
    SparseCodes
        Width ``min(n_nonzero, k)``; slots in the order atoms were selected.
    """
    return _pursue(X, atoms, n_nonzero, tol, gram, order_recursive=True)
