"""Matching pursuit (Mallat & Zhang 1993), batched.

Each step picks the atom with the largest normalised correlation with the residual,
``argmax alpha_j² / G_jj``, adds ``alpha_j / G_jj`` to its coefficient and updates the
residual correlations ``alpha −= (alpha_j / G_jj) G[j]`` — no least-squares re-fit, so
an atom may be picked again. The per-row loop runs in a compiled kernel; each step
costs about ``2k`` operations per row on top of the floor product ``X @ atoms.T``.
"""

from __future__ import annotations

import numpy as np

from ._common import (SparseCodes, empty_codes, gram_and_correlations, greedy_options,
                      positive_int)
from ._numba_cache import kernel
from ._rows import row_energies

__all__ = ["mp", "mp_width"]


def mp(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    n_nonzero: int,
    tol: float | None = None,
    max_steps: int | None = None,
    gram: np.ndarray | None = None,
) -> SparseCodes:
    """Code every row with matching pursuit.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
    n_nonzero : int
        Largest number of *distinct* atoms per row: a row stops when its next pick
        would be a new atom beyond this number.
    tol : float, optional
        Stop a row once its squared residual is at most ``tol · ‖x‖²``.
    max_steps : int, optional
        Largest number of steps (picks) per row; default ``2 · n_nonzero``.
    gram : ndarray of shape (k, k), optional
        ``atoms @ atoms.T``, reused across chunks.

    Returns
    -------
    SparseCodes
        Width ``min(n_nonzero, k)``; slots in the order atoms were first picked.
    """
    k = atoms.shape[0]
    S, tol = greedy_options(k, n_nonzero, tol)
    steps = 2 * S if max_steps is None else positive_int("max_steps", max_steps)
    G, C = gram_and_correlations(X, atoms, gram)  # C: the floor product
    xnorm = row_energies(X)
    n = X.shape[0]
    index, value, count = empty_codes(n, S, X.dtype)
    _mp_rows(C, G, xnorm, X.dtype.type(tol), steps, index, value, count)
    return SparseCodes(index, value, count, k)


def mp_width(n_atoms: int, *, n_nonzero: int, **_: object) -> int:
    """Slots per row of :func:`mp` (``min(n_nonzero, n_atoms)``)."""
    return greedy_options(n_atoms, n_nonzero, None)[0]


@kernel
def _mp_rows(C, G, xnorm, tol, steps, index, value, count):  # pragma: no cover - compiled
    n, k = C.shape
    S = index.shape[1]
    dt = C.dtype
    eps = np.finfo(dt).eps
    alpha = np.empty(k, dtype=dt)
    slot = np.full(k, -1, dtype=np.int64)
    inv_diag = np.zeros(k, dtype=dt)
    for j in range(k):
        if G[j, j] > 0:
            inv_diag[j] = 1.0 / G[j, j]
    for i in range(n):
        for j in range(k):
            alpha[j] = C[i, j]
        err = xnorm[i]
        stop = max(tol * xnorm[i], 16 * eps * xnorm[i])
        s = 0
        for _ in range(steps):
            if err <= stop:
                break
            best = -1
            score = 0.0
            for j in range(k):
                sc = alpha[j] * alpha[j] * inv_diag[j]
                if sc > score:
                    score = sc
                    best = j
            if best < 0:
                break
            j = best
            if slot[j] < 0:
                if s == S:
                    break
                slot[j] = s
                index[i, s] = j
                s += 1
            delta = alpha[j] * inv_diag[j]
            value[i, slot[j]] += delta
            for jj in range(k):
                alpha[jj] -= delta * G[j, jj]
            err -= score
        count[i] = s
        for t in range(s):
            slot[index[i, t]] = -1
