"""Shared pieces of the dictionary learners.

The result object, row validation, mini-batch iteration with resumable counting,
the block-coordinate atom update shared by the statistics-based learners, atom
replacement, seeded generator state in JSON, and the checkpoint clock.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Iterator

import numpy as np
from scipy import sparse

from ..coding import METHODS as CODERS, code, default_options
from ...errors import InputError, problem
from ..prep import Normaliser

__all__ = [
    "LearnedDictionary",
    "CheckpointClock",
    "as_rows",
    "bcd_sweep",
    "coherence",
    "generator_from_json",
    "generator_to_json",
    "iter_batches",
    "replace_atoms",
    "residual_energy",
    "unit_rows",
    "worst_rows",
]

#: Checkpoint callback: receives a dict of numpy arrays and plain-JSON scalars.
Checkpoint = Callable[[dict], None]


@dataclass
class LearnedDictionary:
    """A trained dictionary and what is known about it.

    Attributes
    ----------
    atoms : ndarray of shape (k, d)
        Unit-norm atoms, one per row (orthonormal for ``pca``, grouped in consecutive
        blocks of ``params["block_size"]`` rows for ``subspaces``).
    method : str
        The learner's trade name.
    params : dict
        The options the learner ran with (plain JSON types), including the coder the
        atoms are meant to be used with (``coder``, ``coder_options``).
    diagnostics : dict
        Plain-JSON facts about the result: ``objective`` (trace, one value per
        mini-batch or pass), ``usage`` (how many coded rows used each atom),
        ``coherence`` (largest |cos| between two atoms), ``replaced`` (atoms replaced
        by poorly represented rows), and, from :func:`learn`, ``train_error`` and
        ``holdout_error`` (relative residual energy ``Σ‖x − Wᵀz‖² / Σ‖x‖²``).
    preprocessing : Normaliser or None
        The fitted preprocessing; rows must pass through ``preprocessing.apply`` before
        they are coded with these atoms. ``None`` when the learner saw rows as given.
    """

    atoms: np.ndarray
    method: str
    params: dict = field(default_factory=dict)
    diagnostics: dict = field(default_factory=dict)
    preprocessing: Normaliser | None = None

    @property
    def n_atoms(self) -> int:
        """``k``."""
        return int(self.atoms.shape[0])

    @property
    def n_features(self) -> int:
        """``d``."""
        return int(self.atoms.shape[1])


def unit_rows(W: np.ndarray) -> np.ndarray:
    """Scale each row to unit Euclidean norm (zero rows stay zero).

    Parameters
    ----------
    W : ndarray of shape (k, d)

    Returns
    -------
    ndarray of shape (k, d)
    """
    norms = np.linalg.norm(W, axis=1, keepdims=True)
    return W / np.where(norms > 0, norms, 1)


def coherence(W: np.ndarray) -> float:
    """Mutual coherence: the largest |cos| between two distinct atoms.

    Parameters
    ----------
    W : ndarray of shape (k, d), unit rows

    Returns
    -------
    float
    """
    G = np.abs(W @ W.T)
    np.fill_diagonal(G, 0)
    return float(G.max(initial=0.0))


def as_rows(batch: Any, where: str = "training rows", width: int | None = None) -> np.ndarray:
    """Validate one block of training rows and return it as float64.

    Parameters
    ----------
    batch : array_like of shape (m, d), floating
    where : str
        Name used in error messages.
    width : int, optional
        Required ``d``.

    Returns
    -------
    ndarray of shape (m, d), float64
    """
    arr = np.asarray(batch)
    if arr.ndim != 2 or arr.shape[0] == 0 or arr.shape[1] == 0:
        raise InputError(problem(where, "a non-empty 2-D array (rows, d)",
                                 f"shape {arr.shape}", "Pass patches as rows."))
    if arr.dtype.kind != "f":
        raise InputError(problem(where, "float32 or float64 rows", f"dtype {arr.dtype}",
                                 "Convert with .astype(np.float32) first."))
    if width is not None and arr.shape[1] != width:
        raise InputError(problem(where, f"rows of width {width}", f"width {arr.shape[1]}",
                                 "Feed batches cut from one array."))
    if not np.isfinite(arr).all():
        bad = int(np.flatnonzero(~np.isfinite(arr).all(axis=1))[0])
        raise InputError(problem(f"{where}, row {bad}", "finite values", "NaN or Inf",
                                 "Clean or drop the row before training."))
    return np.asarray(arr, dtype=np.float64)


def iter_batches(
    source: np.ndarray | Iterable[np.ndarray],
    batch_size: int,
    n_passes: int,
    seed: int,
    skip: int = 0,
) -> Iterator[tuple[np.ndarray, bool]]:
    """Yield mini-batches (rows, d) from an array or from an iterable of batches.

    An in-memory array is shuffled once per pass with a generator seeded by ``seed``
    (independent of the learner's own generator) and cut into ``batch_size`` rows, so
    the sequence is a pure function of ``(n_rows, batch_size, n_passes, seed)`` and the
    first ``skip`` batches can be dropped without being built: that is how an
    in-memory run resumes. An iterable is consumed once, as given (the caller streams
    it, e.g. Zarr chunks), each of its batches cut into pieces of at most
    ``batch_size`` rows in order; ``n_passes`` and ``skip`` are ignored: on resume the
    *caller* starts the stream after the batches already seen.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
    batch_size : int
    n_passes : int
    seed : int
    skip : int
        In-memory batches to drop from the front of the sequence.

    Yields
    ------
    rows : ndarray of shape (≤ batch_size, d)
    closes : bool
        True on the last piece of a source batch: the learner counts source batches
        (``batches_seen``) and checkpoints only there.
    """
    if int(batch_size) < 1:
        raise InputError(problem("batch_size", "a positive integer", repr(batch_size),
                                 "Use e.g. 256 or 1024 rows."))
    if not isinstance(source, np.ndarray):
        for block in source:
            block = as_rows(block)
            starts = range(0, block.shape[0], batch_size)
            for i, start in enumerate(starts):
                yield block[start : start + batch_size], i == len(starts) - 1
        return
    rows = as_rows(source)
    rng = np.random.default_rng(seed)
    per_pass = -(-rows.shape[0] // batch_size)
    for p in range(n_passes):
        order = rng.permutation(rows.shape[0])  # drawn even when skipped: keeps the stream
        for b in range(per_pass):
            if p * per_pass + b < skip:
                continue
            yield rows[np.sort(order[b * batch_size : (b + 1) * batch_size])], True


def residual_energy(X: np.ndarray, Z: np.ndarray | sparse.csr_matrix,
                    W: np.ndarray) -> np.ndarray:
    """Squared residual norm of each row.

    Parameters
    ----------
    X : ndarray of shape (m, d)
    Z : ndarray or sparse matrix of shape (m, k)
    W : ndarray of shape (k, d)

    Returns
    -------
    ndarray of shape (m,)
        ``‖x_i − z_i W‖²``.
    """
    R = X - np.asarray(Z @ W)
    return np.einsum("ij,ij->i", R, R)


def bcd_sweep(W: np.ndarray, A: np.ndarray, B: np.ndarray, n_sweeps: int = 1) -> np.ndarray:
    """Block-coordinate descent on ``½ tr(W ᵀA W) − tr(Wᵀ B)`` over unit-norm atoms.

    Each atom in turn is set to the unconstrained minimiser with the others fixed,
    ``w_j + (b_j − a_jᵀ W) / A_jj``, then projected on the unit sphere (the update of
    Mairal, Bach, Ponce & Sapiro, JMLR 2010, Algorithm 2). Atoms with ``A_jj = 0``
    (no coded row has used them since they were set) are left as they are.

    Parameters
    ----------
    W : ndarray of shape (k, d)
        Current atoms (not modified).
    A : ndarray of shape (k, k)
        Accumulated ``Σ z zᵀ``.
    B : ndarray of shape (k, d)
        Accumulated ``Σ z xᵀ``.
    n_sweeps : int

    Returns
    -------
    ndarray of shape (k, d)
    """
    W = W.copy()
    diag = np.diag(A).copy()
    scale = max(float(diag.max(initial=0.0)), 1.0)
    live = np.flatnonzero(diag > 1e-10 * scale)
    for _ in range(n_sweeps):
        # A loop over atoms (k short vector updates), not over rows: each update needs
        # the atoms updated before it, which is what makes it coordinate descent.
        for j in live:
            w = W[j] + (B[j] - A[j] @ W) / diag[j]
            norm = np.sqrt(w @ w)
            if norm > 1e-12:
                W[j] = w / norm
    return W


def worst_rows(X: np.ndarray, energy: np.ndarray, n: int) -> np.ndarray:
    """The ``n`` rows with the largest residual energy, worst first.

    Parameters
    ----------
    X : ndarray of shape (m, d)
    energy : ndarray of shape (m,)
    n : int

    Returns
    -------
    ndarray of shape (min(n, m), d)
    """
    n = min(int(n), X.shape[0])
    if n == 0:
        return X[:0]
    top = np.argpartition(-energy, n - 1)[:n]
    top = top[np.argsort(-energy[top], kind="stable")]
    return X[top]


def replace_atoms(
    W: np.ndarray,
    dead: np.ndarray,
    candidates: np.ndarray,
    duplicate_cos: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Replace unused and duplicate atoms with poorly represented rows.

    An atom is replaced when ``dead`` marks it, or when its |cos| with an atom of
    lower number exceeds ``duplicate_cos`` (the later one of a pair goes). Candidates
    are taken in order (worst represented first), skipping a candidate whose |cos|
    with a kept atom or an earlier pick exceeds ``duplicate_cos``, so a replacement
    never creates a new duplicate.

    Parameters
    ----------
    W : ndarray of shape (k, d), unit rows
    dead : ndarray of shape (k,), bool
    candidates : ndarray of shape (c, d)
        Rows in order of preference.
    duplicate_cos : float

    Returns
    -------
    atoms : ndarray of shape (k, d)
    replaced : ndarray of shape (r,), int
        Numbers of the atoms that were replaced (fewer than asked when candidates ran
        out).
    """
    G = np.abs(W @ W.T)
    dup = np.triu(G > duplicate_cos, k=1).any(axis=0)
    targets = np.flatnonzero(dead | dup)
    if targets.size == 0 or candidates.shape[0] == 0:
        return W, np.zeros(0, dtype=np.int64)
    C = unit_rows(candidates)
    keep = np.ones(W.shape[0], dtype=bool)
    keep[targets] = False
    ok = np.abs(C @ W[keep].T).max(axis=1, initial=0.0) <= duplicate_cos
    ok &= np.linalg.norm(candidates, axis=1) > 0
    picks: list[int] = []
    for c in np.flatnonzero(ok):  # at most k picks; candidates were pre-filtered in bulk
        if len(picks) == targets.size:
            break
        if picks and np.abs(C[picks] @ C[c]).max() > duplicate_cos:
            continue
        picks.append(int(c))
    W = W.copy()
    done = targets[: len(picks)]
    W[done] = C[picks]
    return W, done


def generator_to_json(rng: np.random.Generator) -> str:
    """The generator's full state as a JSON string (128-bit integers included)."""
    return json.dumps(rng.bit_generator.state)


def generator_from_json(text: str) -> np.random.Generator:
    """Inverse of :func:`generator_to_json`."""
    state = json.loads(text)
    bitgen = getattr(np.random, state["bit_generator"])()
    bitgen.state = state
    return np.random.Generator(bitgen)


class CheckpointClock:
    """Calls ``checkpoint(state())`` after every ``every`` consumed batches.

    Parameters
    ----------
    checkpoint : callable or None
        Receives the state dict; ``None`` disables checkpoints.
    every : int
        Period in source batches.
    """

    def __init__(self, checkpoint: Checkpoint | None, every: int) -> None:
        if int(every) < 1:
            raise InputError(problem("checkpoint_every", "a positive integer", repr(every),
                                     "Checkpoint every 1 or more batches."))
        self.checkpoint = checkpoint
        self.every = int(every)

    def tick(self, batches_seen: int, state: Callable[[], dict]) -> None:
        """Call the checkpoint if ``batches_seen`` is a multiple of the period."""
        if self.checkpoint is not None and batches_seen % self.every == 0:
            self.checkpoint(state())


def check_resume(resume: dict | None, method: str, keys: tuple[str, ...]) -> dict | None:
    """Refuse a checkpoint written by another learner or missing a field."""
    if resume is None:
        return None
    missing = [k for k in keys if k not in resume]
    if resume.get("method") != method or missing:
        raise InputError(problem("resume state", f"a checkpoint of learner {method!r} "
                                 f"with fields {sorted(keys)}",
                                 f"method {resume.get('method')!r}, missing {missing}",
                                 "Resume with the state the same learner wrote."))
    return resume


def coded(X: np.ndarray, W: np.ndarray, coder: str, coder_options: dict) -> sparse.csr_matrix:
    """Codes of ``X`` (m, d) over ``W`` (k, d) with a named coder, sparse (m, k), float64.

    Kept sparse because the learners' products with the codes (``Zᵀ Z``, ``Zᵀ X``,
    ``Z W``) then cost in proportion to the nonzeros, not to ``m · k``.
    """
    codes = code(X, W, coder, **coder_options)
    used = (codes.index >= 0) & (codes.value != 0)
    rows = np.broadcast_to(np.arange(codes.index.shape[0])[:, None], codes.index.shape)
    return sparse.csr_matrix(
        (codes.value[used].astype(np.float64), (rows[used], codes.index[used])),
        shape=(X.shape[0], codes.n_atoms))


def atom_usage(Z: sparse.csr_matrix) -> np.ndarray:
    """Rows using each atom: ndarray of shape (k,), int64, from sparse codes (m, k)."""
    return np.bincount(Z.indices, minlength=Z.shape[1]).astype(np.int64)


def refresh_atoms(
    W: np.ndarray,
    window: np.ndarray,
    batch: np.ndarray,
    energy: np.ndarray,
    dead_share: float,
    duplicate_cos: float,
) -> tuple[np.ndarray, np.ndarray]:
    """Replace atoms under-used in a window, or duplicated, by the worst-coded rows.

    Parameters
    ----------
    W : ndarray of shape (k, d), unit rows
    window : ndarray of shape (k,)
        Rows that used each atom since the last refresh.
    batch : ndarray of shape (m, d)
        Rows of the current batch.
    energy : ndarray of shape (m,)
        Their residual energy with the atoms that coded them.
    dead_share : float
        Atoms used by fewer than ``dead_share * mean(window)`` rows are unused.
    duplicate_cos : float

    Returns
    -------
    atoms : ndarray of shape (k, d)
    replaced : ndarray of shape (r,), int
    """
    dead = window < dead_share * window.mean()
    return replace_atoms(W, dead, worst_rows(batch, energy, W.shape[0]), duplicate_cos)


def default_forget(source: object, batch_size: int, n_passes: int) -> float:
    """Forgetting that keeps about one pass of statistics over an in-memory source.

    ``1 − 1/b`` for ``b`` batches per pass when the source is in memory and read in
    several passes (so statistics gathered with older atoms fade out); 1 otherwise.
    With one batch per pass this is 0: each pass starts from fresh statistics.
    """
    if isinstance(source, np.ndarray) and n_passes > 1:
        per_pass = -(-source.shape[0] // batch_size)
        return 1.0 - 1.0 / per_pass
    return 1.0


def check_forget(forget: float, allow_zero: bool = False) -> float:
    """Validate a forgetting factor in (0, 1] (or [0, 1] when ``allow_zero``)."""
    low_ok = forget >= 0 if allow_zero else forget > 0
    if not (low_ok and forget <= 1):
        raise InputError(problem("forget", "a factor in (0, 1]", repr(forget),
                                 "Use 1 for a stationary archive, e.g. 0.99 for drift."))
    return float(forget)


def default_coder_options(coder: str, coder_options: dict | None) -> dict:
    """The coder options a learner runs with: the given ones over the coder's defaults.

    The defaults (:attr:`~atomline.stages.kernels.coding.Coder.defaults`) only supply
    options the coder requires, e.g. ``n_nonzero`` 5 for the greedy coders and ``lam``
    for the lasso coders, so given options are never changed.

    Raises
    ------
    InputError
        Unknown coder, or one a learner cannot use (``learned``: its encoder is trained
        for fixed atoms).
    """
    defaults = default_options(coder)  # refuses an unknown coder, listing them
    if not CODERS[coder].in_learner:
        usable = sorted(name for name, c in CODERS.items() if c.in_learner)
        raise InputError(problem("coder of the learner", f"one of {usable}", repr(coder),
                                 "Pick a listed coder; a learned encoder is trained after "
                                 "the dictionary (train_encoder)."))
    return {**defaults, **(coder_options or {})}


def too_few_rows(n_atoms: int) -> None:
    """Raise the error for a training sample smaller than the dictionary."""
    raise InputError(problem("training rows", f"at least n_atoms = {n_atoms} rows", "fewer",
                             "Train on a larger sample or ask for fewer atoms."))


def atoms_from_rows(rows: np.ndarray, n_atoms: int, rng: np.random.Generator) -> np.ndarray:
    """The learners' usual start: ``n_atoms`` distinct rows drawn with ``rng``, unit-norm.

    Parameters
    ----------
    rows : ndarray of shape (n_rows, d)
    n_atoms : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of shape (n_atoms, d)

    Raises
    ------
    InputError
        Fewer rows than atoms.
    """
    if rows.shape[0] < n_atoms:
        too_few_rows(n_atoms)
    return unit_rows(rows[rng.choice(rows.shape[0], n_atoms, replace=False)])
