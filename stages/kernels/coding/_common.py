"""Shared pieces of the coders: the sparse layout, input validation, the Gram matrix,
option checks and the compiled helpers several coders use.

Compiled helpers use numba through ``_numba_cache.kernel`` (cached once per machine in the
user cache, GIL released) and no ``parallel``: each worker stays single-threaded so
workers × threads never exceeds the cores. They loop over rows *inside* compiled code,
which is how a per-row algorithm runs at the speed of the hardware.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from dataclasses import dataclass

import numpy as np

from ...errors import InputError, problem
from ._numba_cache import kernel
from ._rows import product, top_eigenvalue_bound

__all__ = [
    "SparseCodes",
    "check_problem",
    "gram",
    "lipschitz",
    "positive_int",
    "nonnegative_float",
    "pack_dense",
    "as_dense_init",
    "gram_and_correlations",
    "empty_codes",
]


@dataclass(frozen=True)
class SparseCodes:
    """Fixed-width sparse codes of a chunk, the layout the workspace stores.

    Row ``i`` has ``count[i]`` nonzeros, stored in slots ``0 .. count[i] - 1`` of
    ``index[i]`` and ``value[i]``; the remaining slots hold index ``-1`` and value ``0``.

    Attributes
    ----------
    index : ndarray of shape (n_rows, width), int32
        Atom numbers, ``-1`` in unused slots.
    value : ndarray of shape (n_rows, width), float32 or float64
        Coefficients, ``0`` in unused slots.
    count : ndarray of shape (n_rows,), int32
        Number of used slots per row.
    n_atoms : int
        ``k``, the number of atoms of the dictionary the codes refer to.
    """

    index: np.ndarray
    value: np.ndarray
    count: np.ndarray
    n_atoms: int

    @property
    def width(self) -> int:
        """Number of slots per row (``q``)."""
        return int(self.index.shape[1])

    def dense(self) -> np.ndarray:
        """Scatter into a dense array.

        Returns
        -------
        ndarray of shape (n_rows, n_atoms), same dtype as ``value``
        """
        n = self.index.shape[0]
        out = np.zeros((n, self.n_atoms), dtype=self.value.dtype)
        used = self.index >= 0
        rows = np.broadcast_to(np.arange(n)[:, None], self.index.shape)
        # Slots of one row name distinct atoms, so plain assignment is exact.
        out[rows[used], self.index[used]] = self.value[used]
        return out

    @classmethod
    def from_dense(cls, dense: np.ndarray, width: int | None = None) -> "SparseCodes":
        """Pack a dense code array, keeping nonzeros in increasing atom order.

        Parameters
        ----------
        dense : ndarray of shape (n_rows, n_atoms)
        width : int, optional
            Slots per row; defaults to the largest row count. A row with more nonzeros
            than ``width`` is an error.

        Returns
        -------
        SparseCodes
        """
        nz = dense != 0
        count = nz.sum(axis=1).astype(np.int32)
        q = int(count.max(initial=0)) if width is None else int(width)
        if count.max(initial=0) > q:
            raise InputError(
                problem("codes", f"at most {q} nonzeros per row",
                        f"{int(count.max())}", "Raise the width.")
            )
        n, k = dense.shape
        # Stable sort puts each row's nonzero atoms first, in increasing atom order.
        order = np.argsort(~nz, axis=1, kind="stable")[:, :q]
        slot_used = np.arange(q)[None, :] < count[:, None]
        index = np.where(slot_used, order, -1).astype(np.int32)
        value = np.where(slot_used, np.take_along_axis(dense, order, axis=1), 0)
        return cls(index, value.astype(dense.dtype, copy=False), count, k)

    def limit(self, width: int) -> tuple["SparseCodes", int]:
        """Keep at most ``width`` slots per row, those of largest ``|value|``.

        Kept slots stay in their original order; ties keep the earlier slot.

        Parameters
        ----------
        width : int
            Slots per row of the result (>= 0).

        Returns
        -------
        codes : SparseCodes
            Shape (n_rows, width).
        n_cut : int
            Number of rows that had more than ``width`` nonzeros and lost some.
        """
        width = positive_int("width", width, allow_zero=True)
        n, q = self.index.shape
        if width >= q:
            pad = width - q
            index = np.pad(self.index, ((0, 0), (0, pad)), constant_values=-1)
            value = np.pad(self.value, ((0, 0), (0, pad)))
            return SparseCodes(index, value, self.count.copy(), self.n_atoms), 0
        mag = np.where(self.index >= 0, np.abs(self.value), -1.0)
        # Stable sort on -|value| ranks slots; keep the first `width` and restore order.
        order = np.argsort(-mag, axis=1, kind="stable")[:, :width]
        order.sort(axis=1)
        index = np.take_along_axis(self.index, order, axis=1)
        value = np.take_along_axis(self.value, order, axis=1)
        used = index >= 0
        # Unused slots sort last (mag = -1), so used slots are already packed first.
        count = used.sum(axis=1).astype(np.int32)
        n_cut = int(np.count_nonzero(self.count > width))
        return SparseCodes(index, np.where(used, value, 0).astype(self.value.dtype),
                           count, self.n_atoms), n_cut


def check_problem(X: np.ndarray, atoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Validate a coding problem and bring both arrays to one floating dtype.

    Parameters
    ----------
    X : array_like of shape (n_rows, d)
        Rows to code; float32 or float64.
    atoms : array_like of shape (k, d)
        Dictionary, one atom per row.

    Returns
    -------
    X, atoms : ndarrays, C-contiguous, of the dtype of ``X``

    Raises
    ------
    InputError
        Wrong ranks, mismatched widths, non-floating dtypes, NaN or Inf.
    """
    X = np.asarray(X)
    atoms = np.asarray(atoms)
    for name, arr in (("rows", X), ("atoms", atoms)):
        if arr.ndim != 2:
            raise InputError(problem(name, "a 2-D array", f"shape {arr.shape}",
                                     "Pass rows as (n_rows, d) and atoms as (k, d)."))
        if arr.dtype.kind != "f":
            raise InputError(problem(name, "float32 or float64", f"dtype {arr.dtype}",
                                     "Convert with .astype(np.float32) first."))
    if X.shape[1] != atoms.shape[1]:
        raise InputError(problem("atoms", f"width d = {X.shape[1]} (the rows' width)",
                                 f"atoms of width {atoms.shape[1]}",
                                 "Use the dictionary trained for these patches."))
    if atoms.shape[0] == 0:
        raise InputError(problem("atoms", "at least one atom", "none", "Train a dictionary."))
    for name, arr in (("rows", X), ("atoms", atoms)):
        if not np.isfinite(arr).all():
            bad = int(np.flatnonzero(~np.isfinite(arr).all(axis=1))[0])
            raise InputError(problem(f"{name}, row {bad}", "finite values", "NaN or Inf",
                                     "Clean or drop the row before coding."))
    dtype = X.dtype
    return np.ascontiguousarray(X), np.ascontiguousarray(atoms, dtype=dtype)


def gram(atoms: np.ndarray) -> np.ndarray:
    """The Gram matrix of a dictionary.

    Parameters
    ----------
    atoms : ndarray of shape (k, d)

    Returns
    -------
    ndarray of shape (k, k)
        ``atoms @ atoms.T`` through the row-invariant :func:`._rows.product`: the same
        bytes whatever the BLAS thread count (BLAS's symmetric product differs in the
        last bit between one and two threads) and on every CPU.
    """
    return product(atoms, atoms.T)


#: Gram matrices of the dictionaries coded most recently, by content (:func:`cached_gram`).
_GRAMS: "OrderedDict[tuple, np.ndarray]" = OrderedDict()
_GRAMS_LOCK = threading.Lock()
#: Dictionaries whose Gram matrix is kept (an encode run codes with one; a few more cover
#: an evaluation's baselines and the float32/float64 casts).
_GRAMS_KEPT = 8


def cached_gram(atoms: np.ndarray) -> np.ndarray:
    """:func:`gram` of a dictionary, computed once per dictionary and reused.

    The encode stage codes chunk after chunk with the same atoms; the Gram matrix costs
    ``k²d`` multiply-adds by the fixed-order product, a share of every chunk's work that
    need not be repeated. Entries are keyed by the atoms' dtype, shape and a digest of their
    bytes — equal atoms share an entry however they were loaded, changed atoms are a new
    dictionary — and the least recently used is dropped beyond :data:`_GRAMS_KEPT`.

    Parameters
    ----------
    atoms : ndarray of shape (k, d), float32 or float64

    Returns
    -------
    ndarray of shape (k, k), the dtype of ``atoms``
        A fresh copy of the same bytes as ``gram(atoms)`` (so row invariance holds and no
        caller can change the kept matrix).
    """
    atoms = np.ascontiguousarray(atoms)
    key = (atoms.dtype.str, atoms.shape, hashlib.blake2b(atoms.data, digest_size=16).digest())
    with _GRAMS_LOCK:
        kept = _GRAMS.get(key)
        if kept is not None:
            _GRAMS.move_to_end(key)
            return kept.copy()
    G = gram(atoms)  # outside the lock: threads coding other dictionaries are not held up
    with _GRAMS_LOCK:
        _GRAMS[key] = G
        _GRAMS.move_to_end(key)
        while len(_GRAMS) > _GRAMS_KEPT:
            _GRAMS.popitem(last=False)
    return G.copy()


def lipschitz(atoms: np.ndarray) -> float:
    """Largest eigenvalue of ``atoms @ atoms.T`` (the gradient's Lipschitz constant).

    Parameters
    ----------
    atoms : ndarray of shape (k, d)

    Returns
    -------
    float
        An upper bound on ``‖atoms‖₂²`` within a relative 1e-6, from the smaller of the
        two Gram matrices in float64 (:func:`._rows.top_eigenvalue_bound`: the same
        number on every CPU and thread count, which LAPACK's eigensolvers do not promise).
    """
    A = np.asarray(atoms, dtype=np.float64)
    small = product(A.T, A) if A.shape[1] < A.shape[0] else product(A, A.T)
    top = top_eigenvalue_bound(small)
    return top if top > 0 else 1.0


def positive_int(name: str, value: object, allow_zero: bool = False) -> int:
    """Check an integer option (``>= 1``, or ``>= 0`` with ``allow_zero``)."""
    low = 0 if allow_zero else 1
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) \
            or value < low:
        raise InputError(problem(f"option {name}", f"an integer >= {low}", repr(value),
                                 f"Pass {name}={max(low, 1)} or more."))
    return int(value)


def nonnegative_float(name: str, value: object) -> float:
    """Check a finite real option ``>= 0``."""
    try:
        out = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        out = float("nan")
    if not np.isfinite(out) or out < 0:
        raise InputError(problem(f"option {name}", "a finite number >= 0", repr(value),
                                 f"Pass {name}=0 or more."))
    return out


def as_dense_init(init: "SparseCodes | np.ndarray | None", n: int, k: int,
                  dtype: np.dtype) -> np.ndarray | None:
    """Bring warm-start codes to a dense (n, k) array of ``dtype`` (``None`` stays)."""
    if init is None:
        return None
    dense = init.dense() if isinstance(init, SparseCodes) else np.asarray(init)
    if dense.shape != (n, k) or dense.dtype.kind != "f" or not np.isfinite(dense).all():
        raise InputError(problem("option init", f"finite float codes of shape {(n, k)}",
                                 f"shape {dense.shape}, dtype {dense.dtype}",
                                 "Pass the codes of these rows (SparseCodes or dense)."))
    return np.ascontiguousarray(dense, dtype=dtype)


def pack_dense(dense: np.ndarray, width: int) -> SparseCodes:
    """Pack dense codes into the fixed-width layout, keeping the largest |values|.

    Nonzeros stay in increasing atom order. A row with more than ``width`` nonzeros
    keeps its ``width`` largest by magnitude (ties: lower atom number).

    Parameters
    ----------
    dense : ndarray of shape (n_rows, n_atoms)
    width : int

    Returns
    -------
    SparseCodes
        Shape (n_rows, width).
    """
    n, k = dense.shape
    index, value, count = empty_codes(n, width, dense.dtype)
    _pack_rows(dense, index, value, count)
    return SparseCodes(index, value, count, k)


@kernel
def _pack_rows(dense, index, value, count):  # pragma: no cover - compiled
    for i in range(dense.shape[0]):
        pack_row(dense[i], i, index, value, count)


@kernel
def select_largest(mags, m, out):  # pragma: no cover - compiled
    """Indices of the ``m`` largest entries of ``mags`` (n,) into ``out[:m]``.

    Ties go to the lower index; order of ``out`` is by decreasing value. O(n·m) by
    repeated scans, which for the small ``m`` used here is cheaper than a sort and
    compiles much faster (numba's sorts take tens of seconds to compile).
    """
    n = mags.shape[0]
    taken = np.zeros(n, dtype=np.bool_)
    m = min(m, n)
    for t in range(m):
        best = -1
        for j in range(n):
            if not taken[j] and (best < 0 or mags[j] > mags[best]):
                best = j
        taken[best] = True
        out[t] = best
    return m


@kernel
def pack_row(z, i, index, value, count):  # pragma: no cover - compiled
    """Write the nonzeros of ``z`` (k,) into row ``i`` of the layout, atom order.

    With more nonzeros than slots, keep the largest magnitudes (ties: lower atom).
    """
    k = z.shape[0]
    width = index.shape[1]
    c = 0
    for j in range(k):
        if z[j] != 0:
            c += 1
    keep = np.ones(0, dtype=np.bool_)
    if c > width:
        picked = np.empty(width, dtype=np.int64)
        select_largest(np.abs(z), width, picked)
        keep = np.zeros(k, dtype=np.bool_)
        for t in range(width):
            keep[picked[t]] = True
    s = 0
    for j in range(k):
        v = z[j]
        if v == 0 or (c > width and not keep[j]):
            continue
        index[i, s] = j
        value[i, s] = v
        s += 1
    for t in range(s, width):
        index[i, t] = -1
        value[i, t] = 0
    count[i] = s


@kernel(inline="always")
def soft(v, t):  # pragma: no cover - compiled
    """Soft threshold of a scalar: sign(v) · max(|v| − t, 0)."""
    if v > t:
        return v - t
    if v < -t:
        return v + t
    return 0.0 * v


def greedy_options(n_atoms: int, n_nonzero: object, tol: object) -> tuple[int, float]:
    """Validate the stopping options shared by the greedy coders.

    Returns
    -------
    n_nonzero : int
        Clipped to ``n_atoms``.
    tol : float
        Relative residual energy at which a row stops (0 when not given).
    """
    n_nonzero = positive_int("n_nonzero", n_nonzero)
    tol = 0.0 if tol is None else nonnegative_float("tol", tol)
    return min(n_nonzero, n_atoms), tol


@kernel
def append_atom(j, G, diag, U, Lm, s, alpha):  # pragma: no cover - compiled
    """Grow the progressive Cholesky state of one row by atom ``j``.

    State: ``Lm[:s, :s]`` the Cholesky factor of the active atoms' Gram block,
    ``U[:s] = L⁻¹ G[active, :]`` and ``alpha`` (k,) the residual correlations. Writes
    row ``s`` of ``Lm`` and ``U``, updates ``alpha`` and returns ``v_j`` (the new entry
    of ``L⁻¹ c``; the residual energy drops by ``v_j²``). Returns NaN and changes
    nothing when atom ``j`` lies (numerically) in the span of the active atoms.
    """
    k = alpha.shape[0]
    eps = np.finfo(alpha.dtype).eps
    ww = 0.0
    for t in range(s):
        ww += U[t, j] * U[t, j]
    l2 = diag[j] - ww
    if l2 <= 1e3 * eps * diag[j]:
        return np.nan
    for t in range(s):
        Lm[s, t] = U[t, j]
    el = np.sqrt(l2)
    for jj in range(k):
        U[s, jj] = G[j, jj]
    for t in range(s):
        wt = Lm[s, t]
        if wt != 0:
            for jj in range(k):
                U[s, jj] -= wt * U[t, jj]
    inv = 1.0 / el
    vj = alpha[j] * inv
    for jj in range(k):
        u = U[s, jj] * inv
        U[s, jj] = u
        alpha[jj] -= vj * u
    alpha[j] = 0.0  # exactly orthogonal to the residual now
    Lm[s, s] = el
    return vj


@kernel
def back_substitute(Lm, v, s, out):  # pragma: no cover - compiled
    """Solve ``Lᵀ z = v`` on the leading ``s × s`` block of lower-triangular ``Lm``.

    The last step of the progressive-Cholesky pursuits: ``v`` (≥ s,) holds ``L⁻¹ c[I]``,
    so ``z`` are the least-squares coefficients on the active atoms; written to
    ``out[:s]`` (the row's value slots, of ``v``'s dtype).
    """
    for t in range(s - 1, -1, -1):
        acc = v[t]
        for r in range(t + 1, s):
            acc -= Lm[r, t] * out[r]
        out[t] = acc / Lm[t, t]


@kernel
def orthogonal_pursuit(C, G, xnorm, tol, order_recursive, index, value, count):  # pragma: no cover
    """Per-row OMP / ORMP in the correlation domain with a progressive Cholesky factor.

    For one row with correlations ``c = W x`` (k,), Gram ``G`` (k, k), active set ``I``
    of size s, Cholesky factor ``L`` of ``G[I, I]``:

    * ``U = L⁻¹ G[I, :]`` (s, k); ``v = L⁻¹ c[I]``; residual correlations
      ``alpha = c − Uᵀ v``; squared residual ``‖x‖² − ‖v‖²``; ``q = Σ_t U[t]²``.
    * Adding atom j: ``w = U[:, j]`` is the new row of ``L``, ``l = sqrt(G_jj − ‖w‖²)``,
      ``u = (G[j] − wᵀU) / l``, ``v_j = alpha_j / l``; then ``alpha −= v_j u`` and the
      residual energy drops by ``v_j²`` — no triangular solve until the end.
    * OMP picks ``argmax |alpha_j|``; ORMP picks ``argmax alpha_j² / (G_jj − q_j)``, the
      atom whose orthogonal update lowers the residual most (``G_jj − q_j`` is the
      squared distance of atom j to the span of the active atoms).

    A row stops at ``index.shape[1]`` atoms, when its residual energy is at most
    ``tol · ‖x‖²``, when it is at round-off level, or when every candidate lies in the
    span of the active atoms. Writes ``index``/``value``/``count`` in place, slots in
    the order atoms were selected.
    """
    n, k = C.shape
    S = index.shape[1]
    dt = C.dtype
    eps = np.finfo(dt).eps
    U = np.zeros((S, k), dtype=dt)
    Lm = np.zeros((S, S), dtype=dt)
    v = np.zeros(S, dtype=dt)
    alpha = np.empty(k, dtype=dt)
    q = np.zeros(k, dtype=dt)
    diag = np.empty(k, dtype=dt)
    for j in range(k):
        diag[j] = G[j, j]
    for i in range(n):
        for j in range(k):
            alpha[j] = C[i, j]
        if order_recursive:
            q[:] = 0
        err = xnorm[i]
        stop = max(tol * xnorm[i], 16 * eps * xnorm[i])
        s = 0
        while s < S and err > stop:
            best = -1
            if order_recursive:
                # argmax a_j² / den_j, compared as num·best_den > best_num·den_j so
                # that no division runs per atom.
                bnum = 0.0
                bden = 1.0
                for j in range(k):
                    den = diag[j] - q[j]
                    if den <= 1e3 * eps * diag[j]:
                        continue
                    num = alpha[j] * alpha[j]
                    if num * bden > bnum * den:
                        bnum = num
                        bden = den
                        best = j
            else:
                score = 0.0
                for j in range(k):
                    sc = abs(alpha[j])
                    if sc > score:
                        score = sc
                        best = j
            if best < 0:
                break
            j = best
            vj = append_atom(j, G, diag, U, Lm, s, alpha)
            if vj != vj:  # NaN: the best atom is (numerically) in the span: stop here
                break
            if order_recursive:
                for jj in range(k):
                    q[jj] += U[s, jj] * U[s, jj]
            v[s] = vj
            err -= vj * vj
            index[i, s] = j
            s += 1
        count[i] = s
        back_substitute(Lm, v, s, value[i])


@kernel
def solve_spd_dropping(A, b, out):  # pragma: no cover - compiled
    """Solve ``A y = b`` for a small symmetric positive semi-definite ``A`` (m, m).

    Cholesky factorisation that *drops* a variable whose pivot is at round-off level
    (its atom lies in the span of the earlier ones, e.g. a duplicate atom): the dropped
    variable gets 0 and the rest are the least-squares solution without it. ``A`` is
    overwritten by the factor; ``out`` (m,) receives ``y``. Returns the number kept.
    """
    m = A.shape[0]
    eps = np.finfo(A.dtype).eps
    dropped = np.zeros(m, dtype=np.bool_)
    kept = 0
    for i in range(m):
        d0 = A[i, i]
        for c in range(i):
            acc = A[i, c]
            for t in range(c):
                acc -= A[i, t] * A[c, t]
            A[i, c] = 0.0 if dropped[c] else acc / A[c, c]
        acc = d0
        for t in range(i):
            acc -= A[i, t] * A[i, t]
        if acc <= 1e3 * eps * abs(d0) or d0 <= 0:
            dropped[i] = True
            for t in range(i):
                A[i, t] = 0.0
            A[i, i] = 1.0
        else:
            A[i, i] = np.sqrt(acc)
            kept += 1
    for i in range(m):  # forward: L y = b
        if dropped[i]:
            out[i] = 0.0
            continue
        acc = b[i]
        for t in range(i):
            acc -= A[i, t] * out[t]
        out[i] = acc / A[i, i]
    for i in range(m - 1, -1, -1):  # backward: Lᵀ y = y
        if dropped[i]:
            out[i] = 0.0
            continue
        acc = out[i]
        for r in range(i + 1, m):
            acc -= A[r, i] * out[r]
        out[i] = acc / A[i, i]
    return kept


def gram_and_correlations(
    X: np.ndarray, atoms: np.ndarray, gram_matrix: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """What every Gram-domain coder starts from.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d)
    atoms : ndarray of shape (k, d), same dtype
    gram_matrix : ndarray of shape (k, k), optional
        The caller's ``atoms @ atoms.T`` (reused across chunks), cast to ``X``'s dtype.

    Returns
    -------
    G : ndarray of shape (k, k)
    C : ndarray of shape (n_rows, k)
        ``X @ atoms.T``, the floor product, through the row-invariant
        :func:`._rows.product`.
    """
    G = gram(atoms) if gram_matrix is None else np.ascontiguousarray(gram_matrix, dtype=X.dtype)
    return G, product(X, atoms.T)


def empty_codes(n: int, width: int, dtype: np.dtype) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Output arrays of the fixed-width layout, every slot unused.

    Returns
    -------
    index : ndarray of shape (n, width), int32, all ``-1``
    value : ndarray of shape (n, width), ``dtype``, all ``0``
    count : ndarray of shape (n,), int32, all ``0``
    """
    return (np.full((n, width), -1, dtype=np.int32), np.zeros((n, width), dtype=dtype),
            np.zeros(n, dtype=np.int32))
