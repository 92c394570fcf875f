"""Orthogonal matching pursuit, batched over the rows of a chunk.

The method (Pati, Rezaiifar & Krishnaprasad 1993) selects, for each row, the atom most
correlated with the current residual and re-fits all selected atoms by least squares.
This implementation works in the correlation domain with a Gram matrix and a Cholesky
factor grown one row per step (the "batch" form of Rubinstein, Zibulevsky & Elad, 2008),
for all rows of a chunk at once.

Notation for one row ``x`` with dictionary ``W`` (k, d) and ``G = W Wᵀ``:

* ``c = W x`` — correlations, the one matrix product that is the cost floor;
* ``L`` — Cholesky factor of ``G[I, I]`` for the active set ``I``;
* ``v = L⁻¹ c[I]`` and ``U = L⁻¹ G[I, :]`` (rows ``u_t``);
* then the residual's correlations are ``alpha = c − Uᵀ v`` and the squared residual
  norm is ``‖x‖² − ‖v‖²``.

Adding atom ``j`` appends ``w = U[:, j]`` (this *is* the new row of ``L``, because
``U[:, j] = L⁻¹ G[I, j]``), ``l = sqrt(G[j, j] − ‖w‖²)``, ``u = (G[j] − wᵀU) / l`` and
``v_new = alpha[j] / l``; ``alpha`` and the residual norm then change by a rank-one
update. No triangular solve is needed until the end, when the coefficients are
``L⁻ᵀ v``. Per step the cost is one gather of ``G`` rows and a ``(rows, s) × (s, k)``
batched product; no Python loop runs over rows.
"""

from __future__ import annotations

import numpy as np

from ._common import SparseCodes

__all__ = ["omp"]


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
        Validated rows (see :func:`atomline.stages.coding.code`).
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
        Width ``n_nonzero``; slots in the order atoms were selected.
    """
    G = atoms @ atoms.T if gram is None else gram
    C = X @ atoms.T  # (n, k): the floor product
    xnorm = np.einsum("ij,ij->i", X, X)
    return _omp_gram_kernel(C, G, xnorm, n_nonzero, tol)


def _omp_gram_kernel(
    C: np.ndarray,
    G: np.ndarray,
    xnorm: np.ndarray,
    n_nonzero: int,
    tol: float | None,
) -> SparseCodes:
    """OMP from correlations ``C`` (n, k), Gram ``G`` (k, k) and ``‖x‖²`` (n,)."""
    n, k = C.shape
    S = int(min(n_nonzero, k))
    dtype = C.dtype
    tiny = np.finfo(dtype).eps
    index = np.full((n, S), -1, dtype=np.int32)
    Lrows = np.zeros((n, S, S), dtype=dtype)  # Cholesky factor, one row per step
    V = np.zeros((n, S), dtype=dtype)
    U = np.empty((n, S, k), dtype=dtype)
    alpha = C.copy()
    err = xnorm.astype(dtype, copy=True)
    count = np.zeros(n, dtype=np.int32)
    target = np.zeros(n, dtype=dtype) if tol is None else tol * err
    diagG = np.diag(G).copy()
    # A row leaves the loop when it has nothing left to explain (zero rows included).
    active = err > target
    for s in range(S):
        rows = np.flatnonzero(active)
        if rows.size == 0:
            break
        full = rows.size == n
        sel = slice(None) if full else rows
        a = alpha[sel]
        j = np.argmax(np.abs(a), axis=1)
        r_ = np.arange(rows.size)
        aj = a[r_, j]
        Us = U[sel, :s]  # (m, s, k)
        w = Us[r_, :, j] if s else np.zeros((rows.size, 0), dtype=dtype)
        l2 = diagG[j] - np.einsum("ij,ij->i", w, w)
        # An atom already (numerically) in the span of the active set would make the
        # factor singular: that row stops here with the atoms it has.
        ok = (l2 > 1e3 * tiny * diagG[j]) & (np.abs(aj) > tiny * np.sqrt(xnorm[rows]))
        l = np.sqrt(np.where(ok, l2, 1.0))
        u = G[j]
        if s:
            u = u - np.einsum("ns,nsk->nk", w, Us)
        u = u / l[:, None]
        vj = aj / l
        # Rows that stop keep their state untouched.
        u = np.where(ok[:, None], u, 0)
        vj = np.where(ok, vj, 0)
        Lrows[rows, s, :s] = w
        Lrows[rows, s, s] = l
        U[rows, s] = u
        V[rows, s] = vj
        index[rows, s] = np.where(ok, j, -1)
        alpha[sel] = a - u * vj[:, None]
        err[rows] -= vj * vj
        count[rows] += ok
        still = ok & (err[rows] > target[rows])
        active[rows] = still
    value = _back_substitute(Lrows, V, count)
    value[index < 0] = 0
    return SparseCodes(index, value, count, k)


def _back_substitute(Lrows: np.ndarray, V: np.ndarray, count: np.ndarray) -> np.ndarray:
    """Solve ``Lᵀ z = v`` per row, with ``L`` of size ``count[i]`` (rest ignored)."""
    n, S = V.shape
    z = np.zeros_like(V)
    used = np.arange(S)[None, :] < count[:, None]
    for t in range(S - 1, -1, -1):  # loop over slots (≤ n_nonzero), not rows
        acc = V[:, t] - np.einsum("ij,ij->i", Lrows[:, t + 1 :, t], z[:, t + 1 :])
        diag = np.where(used[:, t], Lrows[:, t, t], 1.0)
        z[:, t] = np.where(used[:, t], acc / diag, 0)
    return z
