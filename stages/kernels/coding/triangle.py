"""The "triangle" k-means activation (Coates, Lee & Ng, AISTATS 2011).

With ``dist_j = ‖x − w_j‖`` the distance of a row to centroid ``j`` and ``μ`` the mean
of those distances, ``z_j = max(0, μ − dist_j)``: about half the outputs are zero.
Distances come from the one product, ``‖x − w_j‖² = ‖x‖² − 2 w_j·x + ‖w_j‖²``; the
activation and the packing run in one compiled pass.
"""

from __future__ import annotations

import numpy as np

from ._common import SparseCodes
from ._rows import product_blocks, row_energies
from ._numba_cache import kernel

__all__ = ["triangle", "triangle_width"]


def triangle(X: np.ndarray, atoms: np.ndarray) -> SparseCodes:
    """Code every row with the triangle activation over centroids ``atoms``.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
        Centroids (need not be unit-norm).

    Returns
    -------
    SparseCodes
        Width ``k``; slots in increasing atom order; values ``> 0``.
    """
    k = atoms.shape[0]
    xnorm = row_energies(X)
    wnorm = row_energies(atoms)
    n = X.shape[0]
    index = np.empty((n, k), dtype=np.int32)
    value = np.empty((n, k), dtype=X.dtype)
    count = np.empty(n, dtype=np.int32)
    for a, b, C in product_blocks(X, atoms.T):  # each block used while cached
        _triangle_rows(C, xnorm[a:b], wnorm, index[a:b], value[a:b], count[a:b])
    return SparseCodes(index, value, count, k)


def triangle_width(n_atoms: int, **_: object) -> int:
    """Slots per row of :func:`triangle`: ``k``."""
    return n_atoms


@kernel
def _triangle_rows(C, xnorm, wnorm, index, value, count):  # pragma: no cover
    n, k = C.shape
    dist = np.empty(k, dtype=C.dtype)
    for i in range(n):
        total = 0.0
        for j in range(k):
            dist[j] = np.sqrt(max(xnorm[i] - 2.0 * C[i, j] + wnorm[j], 0.0))
            total += dist[j]
        mu = total / k
        s = 0
        for j in range(k):
            v = max(mu - dist[j], 0.0)
            index[i, s] = j  # branch-free compaction: s <= j < k
            value[i, s] = v
            s += v > 0
        count[i] = s
        for t in range(s, k):
            index[i, t] = -1
            value[i, t] = 0
