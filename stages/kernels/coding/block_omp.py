"""Block orthogonal matching pursuit (Eldar, Kuppinger & Bölcskei 2010), batched.

The atoms form non-overlapping groups of ``group_size`` consecutive atoms. Each step
picks the group whose residual correlations have the largest energy ``‖alpha_g‖²``,
adds all of its atoms to the active set (atoms in the span of the active ones are
skipped) and re-fits every active atom by least squares, through the same progressive
Cholesky state as OMP (:func:`._common.append_atom`). With one active group and
orthonormal blocks this is the k-subspaces assignment: each row goes to the subspace
that keeps most of its energy, coded by its projection.
"""

from __future__ import annotations

import numpy as np

from ...errors import InputError, problem
from ._common import (SparseCodes, append_atom, back_substitute, empty_codes, gram_and_correlations,
                      nonnegative_float, positive_int)
from ._numba_cache import kernel
from ._rows import row_energies

__all__ = ["block_omp", "block_omp_width"]


def block_omp(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    group_size: int,
    n_groups: int,
    tol: float | None = None,
    gram: np.ndarray | None = None,
) -> SparseCodes:
    """Code every row with block OMP.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
        ``k`` must be a multiple of ``group_size``; group ``g`` is atoms
        ``g·group_size … (g+1)·group_size − 1``.
    group_size : int
        Atoms per group.
    n_groups : int
        Largest number of active groups per row.
    tol : float, optional
        Stop a row once its squared residual is at most ``tol · ‖x‖²``.
    gram : ndarray of shape (k, k), optional
        ``atoms @ atoms.T``, reused across chunks.

    Returns
    -------
    SparseCodes
        Width ``n_groups · group_size`` (capped at ``k``); slots in the order atoms
        were added.
    """
    k = atoms.shape[0]
    width = block_omp_width(k, group_size=group_size, n_groups=n_groups)
    tol = 0.0 if tol is None else nonnegative_float("tol", tol)
    G, C = gram_and_correlations(X, atoms, gram)  # C: the floor product
    xnorm = row_energies(X)
    n = X.shape[0]
    index, value, count = empty_codes(n, width, X.dtype)
    _block_rows(C, G, xnorm, X.dtype.type(tol), int(group_size), index, value, count)
    return SparseCodes(index, value, count, k)


def block_omp_width(n_atoms: int, *, group_size: int, n_groups: int, **_: object) -> int:
    """Slots per row of :func:`block_omp`: ``min(n_groups, k / group_size) · group_size``."""
    group_size = positive_int("group_size", group_size)
    n_groups = positive_int("n_groups", n_groups)
    if n_atoms % group_size:
        raise InputError(problem("option group_size", f"a divisor of the {n_atoms} atoms",
                                 str(group_size), "Pick a group size that divides k."))
    return min(n_groups, n_atoms // group_size) * group_size


@kernel
def _block_rows(C, G, xnorm, tol, group_size, index, value, count):  # pragma: no cover
    n, k = C.shape
    S = index.shape[1]
    n_all = k // group_size
    dt = C.dtype
    eps = np.finfo(dt).eps
    U = np.zeros((S, k), dtype=dt)
    Lm = np.zeros((S, S), dtype=dt)
    v = np.zeros(S, dtype=dt)
    alpha = np.empty(k, dtype=dt)
    taken = np.zeros(n_all, dtype=np.bool_)
    diag = np.empty(k, dtype=dt)
    for j in range(k):
        diag[j] = G[j, j]
    for i in range(n):
        for j in range(k):
            alpha[j] = C[i, j]
        taken[:] = False
        err = xnorm[i]
        stop = max(tol * xnorm[i], 16 * eps * xnorm[i])
        s = 0
        for _ in range(S // group_size):
            if err <= stop:
                break
            best = -1
            score = 0.0
            for g in range(n_all):
                if taken[g]:
                    continue
                e = 0.0
                for j in range(g * group_size, (g + 1) * group_size):
                    e += alpha[j] * alpha[j]
                if e > score:
                    score = e
                    best = g
            if best < 0:
                break
            taken[best] = True
            for j in range(best * group_size, (best + 1) * group_size):
                vj = append_atom(j, G, diag, U, Lm, s, alpha)
                if vj != vj:
                    continue  # in the span of the active atoms: skip it
                v[s] = vj
                err -= vj * vj
                index[i, s] = j
                s += 1
        count[i] = s
        back_substitute(Lm, v, s, value[i])
