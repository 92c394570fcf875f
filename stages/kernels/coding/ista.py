"""Lasso codes by ISTA, the plain proximal-gradient (iterative soft-thresholding) method
(Daubechies, Defrise & De Mol 2004).

The same per-row loop as :mod:`.fista` without momentum: ``z ← soft(z − (G z − c)/Lip,
lam/Lip)``; slower to converge (O(1/t) against O(1/t²)) but monotone. Stops per row on
the relative duality gap.
"""

from __future__ import annotations

import numpy as np

from ._common import SparseCodes
from .fista import proximal_gradient

__all__ = ["ista"]


def ista(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    lam: float,
    positive: bool = False,
    init: SparseCodes | np.ndarray | None = None,
    max_iter: int = 1000,
    gap_tol: float = 1e-4,
    max_nonzero: int | None = None,
    gram: np.ndarray | None = None,
) -> SparseCodes:
    """Code every row with ISTA.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
    lam : float
        Weight of the L1 penalty (``>= 0``).
    positive : bool
        Constrain codes to be non-negative.
    init : SparseCodes or ndarray of shape (n_rows, k), optional
        Warm start.
    max_iter : int
        Largest number of steps per row.
    gap_tol : float
        Stop a row when its duality gap is at most ``gap_tol`` times its objective.
    max_nonzero : int, optional
        Keep at most this many nonzeros per row (largest magnitudes); default ``k``.
    gram : ndarray of shape (k, k), optional
        ``atoms @ atoms.T``, reused across chunks.

    Returns
    -------
    SparseCodes
        Width ``max_nonzero`` or ``k``; slots in increasing atom order.
    """
    return proximal_gradient(X, atoms, lam=lam, positive=positive, init=init,
                             max_iter=max_iter, gap_tol=gap_tol, max_nonzero=max_nonzero,
                             gram=gram, momentum=False)
