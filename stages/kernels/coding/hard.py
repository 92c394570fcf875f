"""Hard assignment: each row goes to its nearest atom (vector quantisation, 1-of-k).

Nearest by Euclidean distance, ``argmin_j ‖w_j‖² − 2 w_j·x`` from the one product; the
code has a single 1 at that atom (ties: the lower atom number).
"""

from __future__ import annotations

import numpy as np

from ._common import SparseCodes
from ._rows import product, row_energies

__all__ = ["hard", "hard_width"]


def hard(X: np.ndarray, atoms: np.ndarray) -> SparseCodes:
    """Assign every row to its nearest atom.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype

    Returns
    -------
    SparseCodes
        Width 1: the nearest atom, value 1.
    """
    wnorm = row_energies(atoms)
    score = product(X, atoms.T)
    score *= -2
    score += wnorm
    nearest = np.argmin(score, axis=1).astype(np.int32)
    n = X.shape[0]
    return SparseCodes(nearest[:, None], np.ones((n, 1), dtype=X.dtype),
                       np.ones(n, dtype=np.int32), atoms.shape[0])


def hard_width(n_atoms: int, **_: object) -> int:
    """Slots per row of :func:`hard`: 1."""
    return 1
