"""Exact lasso codes by the LARS homotopy (Efron, Hastie, Johnstone & Tibshirani 2004).

Minimises ``½‖x − Wᵀz‖² + lam·‖z‖₁`` per row by following the piecewise-linear
solution path from ``z = 0`` (at ``lam ≥ ‖W x‖∞``) down to ``lam``, with the lasso
modification (an atom whose coefficient crosses zero leaves the active set). Works in
the correlation domain with the Gram matrix: per row, ``rho = W x − G z`` are the
residual correlations; on the active set ``A`` they all equal ``±C`` with ``C``
decreasing. A step moves ``z_A`` along ``d = G_AA⁻¹ sign_A`` (a Cholesky factor grown
one atom at a time, rebuilt after a drop) until an inactive atom's ``|rho_j|`` reaches
``C``, an active coefficient reaches 0, or ``C`` reaches ``lam``. Each step costs about
``|A|·k`` operations per row, so very sparse codes cost little more than the floor.

With ``positive=True`` only positive coefficients are allowed (non-negative lasso).
``max_nonzero`` stops a row's path when its active set is full: the code is then the
exact lasso solution for the larger ``lam`` at which the path stopped.
Atoms in the span of the active ones (duplicates) are skipped.
"""

from __future__ import annotations

import numpy as np

from ._common import (SparseCodes, empty_codes, gram_and_correlations, nonnegative_float,
                      positive_int)
from ._numba_cache import kernel

__all__ = ["lars", "lasso_width"]


def lars(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    lam: float,
    positive: bool = False,
    max_nonzero: int | None = None,
    gram: np.ndarray | None = None,
) -> SparseCodes:
    """Code every row with the exact lasso solution (LARS homotopy).

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
    lam : float
        Weight of the L1 penalty (``>= 0``; 0 gives the least-squares path's end).
    positive : bool
        Constrain codes to be non-negative.
    max_nonzero : int, optional
        Largest number of nonzeros per row (default: ``k``); see the module docstring.
    gram : ndarray of shape (k, k), optional
        ``atoms @ atoms.T``, reused across chunks.

    Returns
    -------
    SparseCodes
        Width ``lasso_width(k, max_nonzero=...)``; slots in the order atoms joined.
    """
    k, d = atoms.shape
    lam = nonnegative_float("lam", lam)
    width = lasso_width(k, max_nonzero=max_nonzero)
    G, C = gram_and_correlations(X, atoms, gram)  # C: the floor product
    n = X.shape[0]
    index, value, count = empty_codes(n, width, X.dtype)
    cap = min(width, d, k)  # at most d atoms can be linearly independent
    _lars_rows(C, G, X.dtype.type(lam), bool(positive), cap, index, value, count)
    return SparseCodes(index, value, count, k)


def lasso_width(n_atoms: int, *, max_nonzero: int | None = None, **_: object) -> int:
    """Slots per row of the lasso coders: ``min(max_nonzero, n_atoms)`` or ``n_atoms``."""
    if max_nonzero is None:
        return n_atoms
    return min(positive_int("max_nonzero", max_nonzero), n_atoms)


@kernel
def _cholesky_rebuild(G, A, m, L):  # pragma: no cover - compiled
    for r in range(m):
        for c in range(r + 1):
            acc = G[A[r], A[c]]
            for t in range(c):
                acc -= L[r, t] * L[c, t]
            if r == c:
                L[r, r] = np.sqrt(max(acc, 0.0)) if acc > 0 else 1.0
            else:
                L[r, c] = acc / L[c, c]


@kernel
def _lars_rows(C, G, lam, positive, cap, index, value, count):  # pragma: no cover
    n, k = C.shape
    dt = C.dtype
    eps = np.finfo(dt).eps
    rho = np.empty(k, dtype=dt)
    a = np.empty(k, dtype=dt)
    z = np.zeros(k, dtype=dt)
    in_act = np.zeros(k, dtype=np.bool_)
    banned = np.zeros(k, dtype=np.bool_)
    A = np.empty(max(cap, 1), dtype=np.int64)
    sgn = np.empty(max(cap, 1), dtype=dt)
    L = np.zeros((max(cap, 1), max(cap, 1)), dtype=dt)
    dvec = np.empty(max(cap, 1), dtype=dt)
    w = np.empty(max(cap, 1), dtype=dt)
    max_steps = 8 * cap + 32
    for i in range(n):
        for j in range(k):
            rho[j] = C[i, j]
        banned[:] = False
        Cm = 0.0
        j0 = -1
        for j in range(k):
            v = rho[j] if positive else abs(rho[j])
            if v > Cm and G[j, j] > 0:
                Cm = v
                j0 = j
        m = 0
        if j0 >= 0 and Cm > lam and cap > 0:
            A[0] = j0
            sgn[0] = 1.0 if rho[j0] > 0 else -1.0
            L[0, 0] = np.sqrt(G[j0, j0])
            in_act[j0] = True
            m = 1
        last_drop = -1
        for _ in range(max_steps):
            if m == 0:
                break
            # Direction on the active set: G_AA d = sign_A, by the Cholesky factor.
            for r in range(m):
                acc = sgn[r]
                for t in range(r):
                    acc -= L[r, t] * dvec[t]
                dvec[r] = acc / L[r, r]
            for r in range(m - 1, -1, -1):
                acc = dvec[r]
                for t in range(r + 1, m):
                    acc -= L[t, r] * dvec[t]
                dvec[r] = acc / L[r, r]
            # Rate of change of all correlations: a = G[:, A] d.
            a[:] = 0.0
            for t in range(m):
                dt_ = dvec[t]
                row = A[t]
                for j in range(k):
                    a[j] += dt_ * G[row, j]
            gamma = Cm - lam
            kind = 0
            pick = -1
            pick_sign = 1.0
            for j in range(k):
                if in_act[j] or banned[j] or j == last_drop:
                    continue
                # Compare (C ∓ rho_j) / (1 ∓ a_j) < gamma without dividing (den > 0):
                # the division runs only when a candidate wins.
                den = 1.0 - a[j]
                num = Cm - rho[j]
                if den > eps and num < gamma * den:
                    gamma = max(num / den, 0.0)
                    kind = 1
                    pick = j
                    pick_sign = 1.0
                if not positive:
                    den = 1.0 + a[j]
                    num = Cm + rho[j]
                    if den > eps and num < gamma * den:
                        gamma = max(num / den, 0.0)
                        kind = 1
                        pick = j
                        pick_sign = -1.0
            for t in range(m):
                if dvec[t] != 0:
                    g = -z[A[t]] / dvec[t]
                    if g > 0 and g < gamma:
                        gamma = g
                        kind = 2
                        pick = t
            for t in range(m):
                z[A[t]] += gamma * dvec[t]
            for j in range(k):
                rho[j] -= gamma * a[j]
            Cm -= gamma
            last_drop = -1
            if kind == 0:
                break
            if kind == 2:
                j = A[pick]
                z[j] = 0.0
                in_act[j] = False
                for t in range(pick, m - 1):
                    A[t] = A[t + 1]
                    sgn[t] = sgn[t + 1]
                m -= 1
                _cholesky_rebuild(G, A, m, L)
                last_drop = j
                continue
            if m == cap:
                break  # the row's width is full: stop its path here
            j = pick
            ww = 0.0
            for r in range(m):
                acc = G[A[r], j]
                for t in range(r):
                    acc -= L[r, t] * w[t]
                w[r] = acc / L[r, r]
                ww += w[r] * w[r]
            l2 = G[j, j] - ww
            if l2 <= 1e3 * eps * G[j, j]:
                banned[j] = True  # in the span of the active atoms
                continue
            for t in range(m):
                L[m, t] = w[t]
            L[m, m] = np.sqrt(l2)
            A[m] = j
            sgn[m] = pick_sign
            in_act[j] = True
            m += 1
        s = 0
        for t in range(m):
            j = A[t]
            if z[j] != 0:
                index[i, s] = j
                value[i, s] = z[j]
                s += 1
            z[j] = 0.0
            in_act[j] = False
        count[i] = s
