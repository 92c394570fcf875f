"""Lasso codes by FISTA (Beck & Teboulle 2009) with adaptive restart.

Minimises ``½‖x − Wᵀz‖² + lam·‖z‖₁`` per row by proximal gradient steps of length
``1/Lip`` (``Lip = ‖W‖₂²``, the same for every row) with the standard momentum
sequence ``t ← (1 + √(1 + 4t²)) / 2`` and the gradient restart scheme of O'Donoghue &
Candès (2015): momentum is reset when ``(y − z⁺)·(z⁺ − z) > 0``. The gradient at the
extrapolated point ``y`` is ``G y − c`` with ``c = W x``; iterates are sparse, so it is
summed over the nonzeros of ``y`` only (``nnz(y)·k`` operations per row and step).

Each row stops on its own duality gap: with ``rho = c − G z``, the scaled residual
``θ = s (x − Wᵀz)``, ``s = min(1, lam / ‖rho‖∞)``, is dual feasible and
``P(z) − D(θ) ≤ gap_tol · P(z)`` bounds the relative objective error. The gap is
checked every ``check_every`` steps. :mod:`.ista` runs the same loop without momentum.
"""

from __future__ import annotations

import numpy as np

from ._common import (
    SparseCodes, as_dense_init, empty_codes, gram_and_correlations, lipschitz, nonnegative_float,
    pack_row, positive_int, soft,
)
from .lars import lasso_width
from ._numba_cache import kernel
from ._rows import row_energies

__all__ = ["fista", "proximal_gradient"]


def fista(
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
    """Code every row with FISTA (momentum and adaptive restart).

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype
    lam : float
        Weight of the L1 penalty (``>= 0``).
    positive : bool
        Constrain codes to be non-negative.
    init : SparseCodes or ndarray of shape (n_rows, k), optional
        Warm start (e.g. the codes of the same rows under the previous dictionary).
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
                             gram=gram, momentum=True)


def proximal_gradient(X, atoms, *, lam, positive, init, max_iter, gap_tol, max_nonzero,
                      gram, momentum: bool, check_every: int = 10) -> SparseCodes:
    """Shared driver of ISTA (``momentum=False``) and FISTA; options as :func:`fista`."""
    n = X.shape[0]
    k = atoms.shape[0]
    dtype = X.dtype.type
    lam = nonnegative_float("lam", lam)
    max_iter = positive_int("max_iter", max_iter)
    gap_tol = nonnegative_float("gap_tol", gap_tol)
    width = lasso_width(k, max_nonzero=max_nonzero)
    Z0 = as_dense_init(init, n, k, X.dtype)
    G, C = gram_and_correlations(X, atoms, gram)  # C: the floor product
    xnorm = row_energies(X)
    index, value, count = empty_codes(n, width, X.dtype)
    has_init = Z0 is not None
    Z0 = np.zeros((1, k), dtype=X.dtype) if Z0 is None else Z0
    _prox_grad_rows(C, G, xnorm, Z0, has_init, dtype(lam), dtype(lipschitz(atoms)),
                    bool(positive), bool(momentum), max_iter, dtype(gap_tol), check_every,
                    index, value, count)
    return SparseCodes(index, value, count, k)


@kernel
def _gap(c, G, z, xnorm, lam, positive, h):  # pragma: no cover - compiled
    """Primal objective and duality gap of code ``z`` (k,); ``h`` is scratch (k,)."""
    k = z.shape[0]
    h[:] = 0.0
    l1 = 0.0
    zc = 0.0
    for j in range(k):
        zj = z[j]
        if zj != 0:
            l1 += abs(zj)
            zc += zj * c[j]
            for jj in range(k):
                h[jj] += zj * G[j, jj]
    zh = 0.0
    rmax = 0.0
    for j in range(k):
        zh += z[j] * h[j]
        r = c[j] - h[j]
        r = r if positive else abs(r)
        if r > rmax:
            rmax = r
    err = max(xnorm - 2.0 * zc + zh, 0.0)
    primal = 0.5 * err + lam * l1
    s = 1.0 if rmax <= lam else lam / rmax
    dual = s * (xnorm - zc) - 0.5 * s * s * err
    return primal, primal - dual


@kernel
def _prox_grad_rows(C, G, xnorm, Z0, has_init, lam, Lip, positive, momentum, max_iter,
                    gap_tol, check_every, index, value, count):  # pragma: no cover
    n, k = C.shape
    dt = C.dtype
    eps = np.finfo(dt).eps
    inv = 1.0 / Lip
    thr = lam * inv
    z = np.zeros(k, dtype=dt)
    zold = np.zeros(k, dtype=dt)
    y = np.zeros(k, dtype=dt)
    g = np.zeros(k, dtype=dt)
    h = np.zeros(k, dtype=dt)
    for i in range(n):
        c = C[i]
        for j in range(k):
            v = Z0[i, j] if has_init else 0.0
            z[j] = max(v, 0.0) if positive else v
            y[j] = z[j]
        t = 1.0
        for it in range(max_iter):
            for j in range(k):
                g[j] = -c[j]
            for j in range(k):
                yj = y[j]
                if yj != 0:
                    for jj in range(k):
                        g[jj] += yj * G[j, jj]
            for j in range(k):
                zold[j] = z[j]
                v = y[j] - g[j] * inv
                z[j] = max(v - thr, 0.0) if positive else soft(v, thr)
            if momentum:
                dot = 0.0
                for j in range(k):
                    dot += (y[j] - z[j]) * (z[j] - zold[j])
                if dot > 0:  # the step went uphill: restart the momentum
                    t = 1.0
                    for j in range(k):
                        y[j] = z[j]
                else:
                    tn = 0.5 * (1.0 + np.sqrt(1.0 + 4.0 * t * t))
                    beta = (t - 1.0) / tn
                    for j in range(k):
                        y[j] = z[j] + beta * (z[j] - zold[j])
                    t = tn
            else:
                for j in range(k):
                    y[j] = z[j]
            if (it + 1) % check_every == 0 or it + 1 == max_iter:
                primal, gap = _gap(c, G, z, xnorm[i], lam, positive, h)
                if gap <= gap_tol * max(primal, eps * xnorm[i]):
                    break
        pack_row(z, i, index, value, count)
