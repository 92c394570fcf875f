"""Row-invariant products and reductions: what makes a row's codes depend on that row alone.

The design promises that a record's codes do not depend on how the records were cut into
chunks, on the worker count or on the runner. BLAS cannot keep that promise: a GEMM kernel
sums each output in an order that depends on the row's place in its register tile (seen on
OpenBLAS's Haswell SGEMM: rows 6-11 of every 12 differ in the last bit from rows 0-5), on
the kernel the library picked for this CPU and on the thread count. numpy's own reductions
(``sum``, ``mean``, ``einsum``) peel their SIMD loops by memory alignment, so a row's sum
can change with the row's address.

So every product and row reduction on the coding path is computed here, by compiled
loops whose arithmetic for one output element is fixed: ``out[i, j]`` is the left-to-right
sum ``((0 + x[i,0]·m[0,j]) + x[i,1]·m[1,j]) + …``, one rounded multiply and one rounded add
per term, never fused into an FMA (numba does not contract without ``fastmath``) and never
reassociated. Vectorisation runs across ``j`` (independent outputs), so the vector width
does not change any element. Each element is therefore the same IEEE-754 result on
AVX-512, AVX2 and baseline x86-64 — and equal to numpy's elementwise loop
``acc = acc + x[:, t:t+1] * m[t]``, which the tests use as the reference.

The price: without FMA and register tiling the product runs at about half of single-thread
BLAS speed (tests/benchmarks/bench_coding.py prints the ratio).
"""

from __future__ import annotations

import hashlib
import math

import numpy as np

from ._numba_cache import kernel

__all__ = ["product", "product_blocks", "row_energies", "row_means", "top_eigenvalue_bound",
           "BLOCK_ROWS"]

#: Rows per block of :func:`product_blocks`: a block of outputs stays in cache while the
#: coder that asked for it consumes it.
BLOCK_ROWS = 384


@kernel
def _product_rows(X, MT, out):  # pragma: no cover - compiled
    """``out[i] = X[i] @ MT`` for every row, each element summed left to right over ``t``.

    Four rows share every load of ``MT`` and ``t`` is unrolled by four; both only change
    which instructions run, not the order of the operations on any one element.
    """
    n, d = X.shape
    m = MT.shape[1]
    i = 0
    while i + 4 <= n:
        o0 = out[i]
        o1 = out[i + 1]
        o2 = out[i + 2]
        o3 = out[i + 3]
        for j in range(m):
            o0[j] = 0
            o1[j] = 0
            o2[j] = 0
            o3[j] = 0
        t = 0
        while t + 4 <= d:
            a0, a1, a2, a3 = X[i, t], X[i, t + 1], X[i, t + 2], X[i, t + 3]
            b0, b1, b2, b3 = X[i + 1, t], X[i + 1, t + 1], X[i + 1, t + 2], X[i + 1, t + 3]
            c0, c1, c2, c3 = X[i + 2, t], X[i + 2, t + 1], X[i + 2, t + 2], X[i + 2, t + 3]
            e0, e1, e2, e3 = X[i + 3, t], X[i + 3, t + 1], X[i + 3, t + 2], X[i + 3, t + 3]
            for j in range(m):
                m0, m1, m2, m3 = MT[t, j], MT[t + 1, j], MT[t + 2, j], MT[t + 3, j]
                o0[j] = (((o0[j] + a0 * m0) + a1 * m1) + a2 * m2) + a3 * m3
                o1[j] = (((o1[j] + b0 * m0) + b1 * m1) + b2 * m2) + b3 * m3
                o2[j] = (((o2[j] + c0 * m0) + c1 * m1) + c2 * m2) + c3 * m3
                o3[j] = (((o3[j] + e0 * m0) + e1 * m1) + e2 * m2) + e3 * m3
            t += 4
        while t < d:
            a0, b0, c0, e0 = X[i, t], X[i + 1, t], X[i + 2, t], X[i + 3, t]
            for j in range(m):
                m0 = MT[t, j]
                o0[j] = o0[j] + a0 * m0
                o1[j] = o1[j] + b0 * m0
                o2[j] = o2[j] + c0 * m0
                o3[j] = o3[j] + e0 * m0
            t += 1
        i += 4
    while i < n:  # the last rows: the same operations per element, one row at a time
        o0 = out[i]
        for j in range(m):
            o0[j] = 0
        for t in range(d):
            a0 = X[i, t]
            for j in range(m):
                o0[j] = o0[j] + a0 * MT[t, j]
        i += 1


@kernel
def _energies(X, out):  # pragma: no cover - compiled
    for i in range(X.shape[0]):
        acc = 0.0  # float64 accumulator, left to right
        for t in range(X.shape[1]):
            v = np.float64(X[i, t])
            acc += v * v
        out[i] = acc


@kernel
def _means(X, out):  # pragma: no cover - compiled
    d = X.shape[1]
    for i in range(X.shape[0]):
        acc = 0.0
        for t in range(d):
            acc += np.float64(X[i, t])
        out[i] = acc / max(d, 1)


def _operands(X: np.ndarray, M: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    X = np.ascontiguousarray(X)
    return X, np.ascontiguousarray(M, dtype=X.dtype)


def product(X: np.ndarray, M: np.ndarray) -> np.ndarray:
    """``X @ M`` with every element summed in one fixed order (see the module notes).

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    M : ndarray of shape (d, m); cast to ``X``'s dtype

    Returns
    -------
    ndarray of shape (n_rows, m), ``X``'s dtype
        Row ``i`` depends on ``X[i]`` and ``M`` alone, bit for bit, on every CPU.
    """
    X, M = _operands(X, M)
    out = np.empty((X.shape[0], M.shape[1]), dtype=X.dtype)
    _product_rows(X, M, out)
    return out


def product_blocks(X: np.ndarray, M: np.ndarray):
    """Yield ``(start, stop, X[start:stop] @ M)`` block by block (``BLOCK_ROWS`` rows).

    The same numbers as :func:`product`; a coder that consumes each block at once keeps
    the product in cache instead of writing all of it to memory.

    Yields
    ------
    start, stop : int
    block : ndarray of shape (stop - start, m)
        Valid until the next block is produced.
    """
    X, M = _operands(X, M)
    n = X.shape[0]
    buf = np.empty((BLOCK_ROWS, M.shape[1]), dtype=X.dtype)
    for start in range(0, n, BLOCK_ROWS):  # loop over blocks of rows, not rows
        stop = min(n, start + BLOCK_ROWS)
        block = buf[: stop - start]
        _product_rows(X[start:stop], M, block)
        yield start, stop, block


def _per_row(reduce, X: np.ndarray) -> np.ndarray:
    out = np.empty(X.shape[0], dtype=np.float64)
    reduce(np.ascontiguousarray(X), out)
    return out.astype(X.dtype, copy=False)


def row_energies(X: np.ndarray) -> np.ndarray:
    """``‖X[i]‖²`` per row of ``X`` (n_rows, d), summed left to right in float64.

    Returns
    -------
    ndarray of shape (n_rows,), ``X``'s dtype
    """
    return _per_row(_energies, X)


def row_means(X: np.ndarray) -> np.ndarray:
    """Mean of each row of ``X`` (n_rows, d), summed left to right in float64.

    Returns
    -------
    ndarray of shape (n_rows,), ``X``'s dtype
    """
    return _per_row(_means, X)


def _frobenius(B: np.ndarray) -> float:
    """‖B‖_F of a float64 matrix: one left-to-right sum over all its entries."""
    return math.sqrt(float(row_energies(B.reshape(1, -1))[0])) if B.size else 0.0


_BOUNDS: dict[bytes, float] = {}


def top_eigenvalue_bound(S: np.ndarray, rtol: float = 1e-6, max_squarings: int = 24) -> float:
    """An upper bound on the largest eigenvalue of a symmetric PSD matrix, tight to ``rtol``.

    For symmetric PSD ``S`` and every ``p``, ``λ_max ≤ ‖S^p‖_F^(1/p)`` (the Frobenius norm
    bounds the spectral norm), and the bound falls to ``λ_max`` as ``p`` grows (at most
    ``rank^(1/2p)`` above it; Golub & Van Loan, *Matrix Computations*, the norm
    inequalities of §2.3). ``p`` doubles by repeated squaring, each square normalised to
    unit Frobenius norm with the scale kept as a logarithm, until the bound moves by less
    than ``rtol``. Built only from :func:`product` and left-to-right sums, so the bound is
    the same number on every CPU and thread count, unlike LAPACK's eigenvalue routines.
    Results are memoised by the matrix's bytes (a dictionary is reused for every chunk).

    Parameters
    ----------
    S : ndarray of shape (m, m), float64, symmetric positive semi-definite

    Returns
    -------
    float
        ``≥ λ_max(S)`` up to round-off; 0 for the zero matrix.
    """
    S = np.ascontiguousarray(S, dtype=np.float64)
    key = hashlib.blake2b(S.tobytes(), digest_size=16).digest() + repr(S.shape).encode()
    if key in _BOUNDS:
        return _BOUNDS[key]
    norm = _frobenius(S)
    if norm == 0.0:
        return 0.0
    B = S / norm
    log_scale, power = math.log(norm), 1
    bound = norm
    for _ in range(max_squarings):
        B = product(B, B)
        f = _frobenius(B)
        if f == 0.0:  # nilpotent in floating point: only for a (numerically) zero matrix
            break
        B /= f
        log_scale, power = 2.0 * log_scale + math.log(f), 2 * power
        new = math.exp(log_scale / power)
        done = bound - new <= rtol * new
        bound = min(bound, new)
        if done:
            break
    if len(_BOUNDS) > 32:
        _BOUNDS.clear()
    _BOUNDS[key] = bound
    return bound
