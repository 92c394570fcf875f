"""Compressive sampling matching pursuit (CoSaMP; Needell & Tropp 2009), batched.

Per row and iteration: take the ``2s`` atoms most correlated with the residual, merge
them with the current support (at most ``3s`` atoms), solve least squares on that
merged set, keep its ``s`` largest coefficients and re-fit them by least squares
(the common "debiased" variant). A row stops when its residual energy falls to
``tol · ‖x‖²``, when its support stops changing, or after ``max_iter`` iterations; it
returns the best iterate seen. Least squares run on small Gram sub-matrices through a
Cholesky factor that drops atoms in the span of others (duplicates).
"""

from __future__ import annotations

import numpy as np

from ._common import (
    SparseCodes, empty_codes, gram_and_correlations, greedy_options, positive_int, select_largest,
    solve_spd_dropping,
)
from ._numba_cache import kernel
from ._rows import row_energies

__all__ = ["cosamp", "cosamp_width"]


def cosamp(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    n_nonzero: int,
    tol: float | None = None,
    max_iter: int = 10,
    gram: np.ndarray | None = None,
) -> SparseCodes:
    """Code every row with CoSaMP.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
    n_nonzero : int
        Sparsity ``s`` of every row's code.
    tol : float, optional
        Stop a row once its squared residual is at most ``tol · ‖x‖²``.
    max_iter : int
        Largest number of iterations per row.
    gram : ndarray of shape (k, k), optional
        ``atoms @ atoms.T``, reused across chunks.

    Returns
    -------
    SparseCodes
        Width ``min(n_nonzero, k)``; slots in increasing atom order.
    """
    k = atoms.shape[0]
    S, tol = greedy_options(k, n_nonzero, tol)
    max_iter = positive_int("max_iter", max_iter)
    G, C = gram_and_correlations(X, atoms, gram)  # C: the floor product
    xnorm = row_energies(X)
    n = X.shape[0]
    index, value, count = empty_codes(n, S, X.dtype)
    _cosamp_rows(C, G, xnorm, X.dtype.type(tol), max_iter, index, value, count)
    return SparseCodes(index, value, count, k)


def cosamp_width(n_atoms: int, *, n_nonzero: int, **_: object) -> int:
    """Slots per row of :func:`cosamp` (``min(n_nonzero, n_atoms)``)."""
    return greedy_options(n_atoms, n_nonzero, None)[0]


@kernel
def _least_squares(G, c, T, m, coef):  # pragma: no cover - compiled
    """Least squares on atoms ``T[:m]``: solve ``G[T,T] b = c[T]`` into ``coef[:m]``."""
    A = np.empty((m, m), dtype=G.dtype)
    rhs = np.empty(m, dtype=G.dtype)
    for a in range(m):
        rhs[a] = c[T[a]]
        for b in range(m):
            A[a, b] = G[T[a], T[b]]
    solve_spd_dropping(A, rhs, coef[:m])


@kernel
def _sort_small(a, m):  # pragma: no cover - compiled
    """Insertion sort of ``a[:m]`` in place (m is the sparsity, a handful)."""
    for t in range(1, m):
        v = a[t]
        r = t - 1
        while r >= 0 and a[r] > v:
            a[r + 1] = a[r]
            r -= 1
        a[r + 1] = v


@kernel
def _cosamp_rows(C, G, xnorm, tol, max_iter, index, value, count):  # pragma: no cover
    n, k = C.shape
    S = index.shape[1]
    dt = C.dtype
    eps = np.finfo(dt).eps
    wide = min(3 * S, k)
    alpha = np.empty(k, dtype=dt)
    mark = np.zeros(k, dtype=np.bool_)
    T = np.empty(wide, dtype=np.int64)
    coef = np.empty(wide, dtype=dt)
    supp = np.empty(S, dtype=np.int64)
    top = np.empty(min(2 * S, k), dtype=np.int64)
    keep = np.empty(S, dtype=np.int64)
    new = np.empty(S, dtype=np.int64)
    z = np.empty(S, dtype=dt)
    for i in range(n):
        c = C[i]
        for j in range(k):
            alpha[j] = c[j]
        m_supp = 0
        best_err = xnorm[i]
        best_m = 0
        stop = max(tol * xnorm[i], 16 * eps * xnorm[i])
        for _ in range(max_iter):
            if best_err <= stop:
                break
            # Merge the support with the 2s largest residual correlations.
            n_top = select_largest(np.abs(alpha), 2 * S, top)
            m = 0
            for t in range(m_supp):
                T[m] = supp[t]
                mark[supp[t]] = True
                m += 1
            for t in range(n_top):
                if m == wide:
                    break
                j = top[t]
                if not mark[j]:
                    T[m] = j
                    mark[j] = True
                    m += 1
            _least_squares(G, c, T, m, coef)
            # Prune to the s largest, in increasing atom order, and re-fit.
            n_keep = select_largest(np.abs(coef[:m]), S, keep)
            for t in range(n_keep):
                new[t] = T[keep[t]]
            _sort_small(new, n_keep)
            changed = n_keep != m_supp
            for t in range(n_keep):
                if not changed and new[t] != supp[t]:
                    changed = True
            for t in range(m):
                mark[T[t]] = False
            m_new = 0
            for t in range(n_keep):
                supp[m_new] = new[t]
                m_new += 1
            _least_squares(G, c, supp, m_new, z)
            m_supp = m_new
            # Residual correlations and energy of the new iterate.
            for j in range(k):
                alpha[j] = c[j]
            zc = 0.0
            for t in range(m_supp):
                zt = z[t]
                zc += zt * c[supp[t]]
                if zt != 0:
                    row = supp[t]
                    for j in range(k):
                        alpha[j] -= zt * G[row, j]
            za = 0.0
            for t in range(m_supp):
                za += z[t] * alpha[supp[t]]
            err = xnorm[i] - zc - za
            if err < best_err:
                best_err = err
                s = 0
                for t in range(m_supp):
                    if z[t] != 0:
                        index[i, s] = supp[t]
                        value[i, s] = z[t]
                        s += 1
                for t in range(s, S):
                    index[i, t] = -1
                    value[i, t] = 0
                best_m = s
            if not changed:
                break
        count[i] = best_m
