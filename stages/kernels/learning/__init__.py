"""Dictionary learners: one public entry point, one module per algorithm.

Example
-------
>>> import numpy as np
>>> from atomline.stages.kernels.learning import learn
>>> rows = np.random.default_rng(0).standard_normal((2000, 16))
>>> learned = learn(rows, 24, "online", coder_options={"n_nonzero": 3}, seed=1)
>>> learned.atoms.shape, bool(np.allclose(np.linalg.norm(learned.atoms, axis=1), 1))
((24, 16), True)

Methods
-------
``online``
    Mini-batch learning with accumulated statistics and block-coordinate atom updates.
``sgd``, ``averaged-sgd``
    Projected stochastic gradient on the atoms, plain or with iterate averaging.
``batch``
    Alternating minimisation over the whole sample; its statistics are sums over
    chunks (:func:`batch_statistics`, :func:`combine_statistics`,
    :func:`batch_update` let a flow compute them chunk-parallel).
``pca``
    The ``k ≤ d`` leading principal directions (orthonormal atoms).
``kmeans``
    Spherical k-means, mini-batch: each row is coded by its best-matching atom.
``subspaces``
    k-subspaces: ``n_atoms / block_size`` blocks of orthonormal atoms, one subspace
    each.
``random-patches``
    Uniformly drawn training rows, normalised: the baseline dictionary.

Every learner takes an in-memory array or an iterable of mini-batches, a ``seed``,
and ``checkpoint`` / ``checkpoint_every`` / ``resume`` (see :func:`learn`). Each is one
:class:`Method` record in :data:`METHODS`; :func:`option_table` lists, per learner,
``(name, default, type, help)`` of each option.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Mapping

import numpy as np

from ...errors import InputError, problem
from .._records import Option, keyword_options, option_list, refuse_unknown_options
from ..prep import Normaliser
from ._common import (LearnedDictionary, as_rows, atom_usage, coded, default_coder_options,
                      residual_energy)
from .batch import batch, batch_statistics, batch_update, combine_statistics
from .kmeans import kmeans
from .online import online
from .pca import pca
from .random_patches import random_patches
from .reservoir import reservoir_sample
from .sgd import averaged_sgd, sgd
from .subspaces import subspaces

__all__ = [
    "learn",
    "check_learner",
    "check_learner_options",
    "default_coder_options",
    "learner_option_names",
    "option_table",
    "takes_coder",
    "TRAIN_OWN_OPTIONS",
    "METHODS",
    "Method",
    "Option",
    "LearnedDictionary",
    "reservoir_sample",
    "batch_statistics",
    "combine_statistics",
    "batch_update",
]

#: Parameters of every learner that :func:`learn` sets itself, not options of the caller's.
_WIRED = ("checkpoint", "resume")


@dataclass(frozen=True)
class Method:
    """One learner: its function, its options and their help.

    Attributes
    ----------
    name : str
        Trade name (the key of :data:`METHODS`).
    run : callable
        ``run(source, n_atoms, *, checkpoint, resume, **options) -> LearnedDictionary``;
        its other keyword-only parameters are its options (names, defaults, types).
    help : str
        One line saying what the learner does.
    option_help : mapping of str to str
        The help of the options not in :data:`_SHARED_HELP`, or where the shared line
        does not fit.
    """

    name: str
    run: Callable[..., LearnedDictionary]
    help: str
    option_help: Mapping[str, str]

    def __post_init__(self) -> None:
        self.options  # refuses a record out of step with its function

    @property
    def options(self) -> tuple[Option, ...]:
        """``(name, default, type, help)`` of every option, sorted by name."""
        names = keyword_options(self.run, leave_out=_WIRED)
        shared = {n: _SHARED_HELP[n] for n in names if n in _SHARED_HELP}
        return option_list(self.run, {**shared, **self.option_help}, leave_out=_WIRED)

    @property
    def takes_coder(self) -> bool:
        """Whether it codes its batches with a coder the caller picks.

        pca, kmeans and subspaces fix their own coder (recorded in the result's params).
        """
        return "coder" in keyword_options(self.run)


#: Help of the options several learners share, written once.
_SHARED_HELP = {
    "coder": "Coder of the mini-batches (a name of atomline.stages.kernels.coding.METHODS).",
    "coder_options": "Its options; those it requires default to the coder's own defaults.",
    "batch_size": "Rows per mini-batch (larger stream batches are cut to this size).",
    "n_passes": "Passes over an in-memory source.",
    "forget": "Factor on the accumulated statistics before each batch; default about one "
              "pass of memory in memory over several passes, else 1.",
    "replace_every": "Batches between checks for unused or duplicate atoms; 0 never replaces.",
    "dead_share": "An atom used by fewer than this share of the mean usage in a window is "
                  "replaced.",
    "duplicate_cos": "Two atoms with |cos| above this are duplicates (the later is replaced).",
    "seed": "Seeds the shuffling and the initial atoms.",
    "init": "Starting atoms (n_atoms, d); by default distinct training rows.",
    "checkpoint_every": "Source batches between checkpoints.",
}

#: Learners by their trade name.
METHODS: dict[str, Method] = {m.name: m for m in (
    Method("online", online, "Mini-batch learning with accumulated statistics and "
           "block-coordinate atom updates.",
           {"warmup": "Exponent of the (1 − 1/t) down-weighting of past statistics; 0 keeps "
                      "them all.",
            "n_sweeps": "Block-coordinate sweeps over the atoms per batch."}),
    Method("sgd", sgd, "Projected stochastic gradient on the atoms.",
           {"step": "Step size in units of 1/L, L the batch gradient's Lipschitz constant.",
            "step_decay_batches": "Batches τ of the step's decay step / sqrt(1 + t/τ)."}),
    Method("averaged-sgd", averaged_sgd,
           "Projected stochastic gradient returning the weighted average of its iterates.",
           {"step": "Step size in units of 1/L, L the batch gradient's Lipschitz constant.",
            "step_decay_batches": "Batches τ of the step's decay step / sqrt(1 + t/τ).",
            "average_decay": "c of the iterate averaging weights (1 + c) / (t + c)."}),
    Method("batch", batch, "Alternating minimisation over the whole sample, one pass per "
           "iteration.",
           {"n_passes": "Iterations, each one full pass.",
            "chunk_size": "Rows per chunk for an in-memory source.",
            "n_sweeps": "Block-coordinate sweeps over the atoms per iteration.",
            "dead_share": "An atom used by fewer than this share of the mean usage in a pass "
                          "is replaced.",
            "seed": "Seeds the initial atoms (drawn rows).",
            "checkpoint_every": "Passes between checkpoints."}),
    Method("pca", pca, "The k ≤ d leading principal directions (orthonormal atoms).",
           {"center": "Remove the rows' mean before the eigen-decomposition.",
            "batch_size": "Rows per batch for an in-memory source.",
            "seed": "Unused by the computation (recorded like the other learners')."}),
    Method("kmeans", kmeans, "Spherical k-means, mini-batch: each row is coded by its "
           "best-matching atom.",
           {"forget": "Factor on the cluster sums before each batch; default as online's."}),
    Method("subspaces", subspaces, "k-subspaces: n_atoms / block_size blocks of orthonormal "
           "atoms, one subspace each.",
           {"block_size": "Dimension of each subspace (a divisor of n_atoms, at most d).",
            "replace_every": "Batches between re-seeding blocks no row used; 0 never does.",
            "forget": "Factor on the scatters before each batch; default as online's."}),
    Method("random-patches", random_patches, "Uniformly drawn training rows, normalised: the "
           "baseline dictionary.",
           {"coder": "The coder the atoms are meant for (recorded; used for the diagnostics).",
            "batch_size": "Rows per batch for an in-memory source.",
            "seed": "Seeds the draw."}),
)}

#: Most rows coded to measure the training error.
_PROBE_MAX = 10_000
#: Rows coded at once when measuring errors.
_PROBE_PIECE = 2048
#: Prefix of the entries :func:`learn` adds to a learner's checkpoint state.
_OWN = "learn."

#: Learner options the train stage sets from its own arguments, so not taken as learner options.
TRAIN_OWN_OPTIONS = ("seed", "coder", "coder_options")


def option_table() -> dict[str, list[Option]]:
    """Every learner's options: ``{method: [(name, default, type, help), ...]}``.

    ``coder_options`` defaults to ``None``: the coder's own defaults
    (:func:`atomline.stages.kernels.coding.option_table`).
    """
    return {name: list(m.options) for name, m in sorted(METHODS.items())}


def check_learner(method: str, n_atoms: int) -> None:
    """Refuse an unknown learner or fewer than one atom (before any row is read)."""
    if method not in METHODS:
        raise InputError(problem("learning method", f"one of {sorted(METHODS)}",
                                 repr(method), "Pick a listed method."))
    if int(n_atoms) < 1:
        raise InputError(problem("n_atoms", "a positive integer", repr(n_atoms),
                                 "Ask for at least one atom."))


def learner_option_names(method: str) -> list[str]:
    """The option names the learner ``method`` takes, sorted (``checkpoint`` and
    ``resume`` are :func:`learn`'s own)."""
    check_learner(method, 1)
    return [o.name for o in METHODS[method].options]


def check_learner_options(method: str, options: dict, own: tuple[str, ...] = ()) -> None:
    """Refuse option names the learner does not take (before any row is read), listing
    those it does; and those in ``own``, which the caller sets from its own arguments
    (the train stage: :data:`TRAIN_OWN_OPTIONS`)."""
    given_twice = sorted(set(options) & set(own))
    if given_twice:
        raise InputError(problem(f"options of learner {method!r}", "options other than the "
                                 f"command's own arguments {sorted(own)}",
                                 f"{given_twice} among the learner options",
                                 "Give them as their own options (e.g. --seed, --coder, "
                                 "--coder-option), not as --learner-option."))
    refuse_unknown_options(f"learner {method!r}", options, learner_option_names(method),
                           "--method")


def takes_coder(method: str) -> bool:
    """Whether the learner codes its batches with a coder the caller picks (see
    :attr:`Method.takes_coder`); False for an unknown name."""
    return method in METHODS and METHODS[method].takes_coder


def learn(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    method: str = "online",
    *,
    preprocessing: Normaliser | None = None,
    holdout: float | np.ndarray = 0.05,
    checkpoint: Callable[[dict], None] | None = None,
    resume: dict | None = None,
    **options: Any,
) -> LearnedDictionary:
    """Learn a dictionary of ``n_atoms`` atoms.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
        Training rows, in memory or streamed as mini-batches.
    n_atoms : int
        ``k``, the number of atoms.
    method : str
        A key of :data:`METHODS`.
    preprocessing : Normaliser, optional
        Unfitted preprocessing: fitted on the training rows in memory (or on the
        training rows of the first mini-batch of a stream), applied to every row
        before learning, and returned fitted on the result.
    holdout : float in [0, 1), or ndarray of shape (m, d)
        Rows kept out of training to measure the representation error: a fraction of
        the in-memory rows (seeded draw) or of the first batch of a stream, or an
        array of raw rows.
    checkpoint : callable, optional
        Receives the learner's state dict (numpy arrays and JSON scalars) every
        ``checkpoint_every`` batches (a learner option, default 10); the state also
        carries the fitted preprocessing and the held-out rows (keys ``"learn.*"``).
    resume : dict, optional
        A state received by ``checkpoint``; run with the same source and options.
        An in-memory source is skipped forward by the learner; for a stream the caller
        starts at batch number ``resume["batches_seen"]`` (0-based) of the sequence the
        interrupted run was fed. The result equals that of an uninterrupted run.
    **options
        The learner's own options (see its module), e.g. ``seed``, ``coder``,
        ``coder_options``, ``batch_size``, ``n_passes``.

    Returns
    -------
    LearnedDictionary
        Atoms of shape (n_atoms, d), the fitted preprocessing, and diagnostics
        including ``train_error`` and ``holdout_error`` (relative residual energy
        ``Σ‖x − Wᵀz‖² / Σ‖x‖²`` with the dictionary's coder).
    """
    check_learner(method, n_atoms)
    check_learner_options(method, options)
    seed = int(options.get("seed", 0))
    if resume is None or isinstance(source, np.ndarray):
        # In memory, the split and the fit are pure functions of the rows and the seed,
        # so a resumed run simply repeats them.
        fitted, source, held, probe = _split_and_fit(source, preprocessing, holdout, seed)
    else:
        fitted, held, probe = _restore(resume)
        if fitted is not None:
            source = _Applied(source, fitted)
    own = _own_state(fitted, held, probe)
    inner = None if checkpoint is None else (lambda state: checkpoint({**state, **own}))
    try:
        result = METHODS[method].run(source, int(n_atoms), checkpoint=inner, resume=resume,
                                 **options)
    except TypeError as exc:
        raise InputError(problem(f"options of learner {method!r}", "the method's own options",
                                 str(exc), "See atomline.stages.kernels.learning's docstring.")) from exc
    result.preprocessing = fitted
    coder, coder_options = result.params["coder"], result.params["coder_options"]
    train_error, probe_usage = _relative_error(probe, result.atoms, coder, coder_options)
    result.diagnostics["train_error"] = train_error
    result.diagnostics["holdout_error"] = _relative_error(held, result.atoms, coder,
                                                          coder_options)[0]
    if not result.diagnostics.get("usage"):
        # Learners that code no rows while training: usage over the probe rows.
        result.diagnostics["usage"] = probe_usage
    result.diagnostics["n_train_probe"] = int(probe.shape[0])
    result.diagnostics["n_holdout"] = int(held.shape[0])
    return result


class _Applied:
    """A re-iterable view of a stream with the fitted preprocessing applied per batch.

    ``drop`` removes rows (held out) from the first batch of every iteration.
    """

    def __init__(self, source: Iterable[np.ndarray] | np.ndarray, prep: Normaliser | None,
                 drop: np.ndarray | None = None) -> None:
        self.source, self.prep, self.drop = source, prep, drop

    def __iter__(self) -> Iterator[np.ndarray]:
        for i, rows in enumerate(self.source):
            rows = as_rows(rows)
            if i == 0 and self.drop is not None:
                rows = rows[~self.drop]
            yield rows if self.prep is None else self.prep.apply(rows)


def _split_and_fit(
    source: np.ndarray | Iterable[np.ndarray],
    preprocessing: Normaliser | None,
    holdout: float | np.ndarray,
    seed: int,
) -> tuple[Normaliser | None, Any, np.ndarray, np.ndarray]:
    """Hold rows out, fit the preprocessing on training rows, pick training probe rows."""
    rng = np.random.default_rng([seed, 7])  # own stream: the learner's draws are unchanged
    given = None if np.isscalar(holdout) else as_rows(holdout, "holdout")
    if given is None and not 0 <= float(holdout) < 1:
        raise InputError(problem("holdout", "a fraction in [0, 1) or an array of rows",
                                 repr(holdout), "Use e.g. 0.05."))
    if isinstance(source, np.ndarray):
        rows = as_rows(source)
        out = np.zeros(rows.shape[0], dtype=bool)
        if given is None:
            out[rng.permutation(rows.shape[0])[: _n_out(rows.shape[0], holdout)]] = True
        train, held = rows[~out], (rows[out] if given is None else given)
        fitted = None if preprocessing is None else preprocessing.fit(train)
        if fitted is not None:
            train, held = fitted.apply(train), fitted.apply(held)
        probe = train[np.sort(rng.permutation(train.shape[0])[:_PROBE_MAX])]
        return fitted, train, held, probe
    stream = iter(source)
    try:
        first = as_rows(next(stream))
    except StopIteration:
        raise InputError(problem("training stream", "at least one batch", "no batches",
                                 "Check the sampled array is not empty.")) from None
    out = np.zeros(first.shape[0], dtype=bool)
    if given is None:
        out[rng.permutation(first.shape[0])[: _n_out(first.shape[0], holdout)]] = True
    train, held = first[~out], (first[out] if given is None else given)
    fitted = None if preprocessing is None else preprocessing.fit(train)
    if fitted is not None:
        train, held = fitted.apply(train), fitted.apply(held)
    rest = _Chain(first, stream, source)
    return fitted, _Applied(rest, fitted, out if out.any() else None), held, train[:_PROBE_MAX]


class _Chain:
    """The stream with its first batch put back; re-iterable when the source is."""

    def __init__(self, first: np.ndarray, stream: Iterator, source: Iterable) -> None:
        self.first, self.stream, self.source, self.used = first, stream, source, False

    def __iter__(self) -> Iterator[np.ndarray]:
        if not self.used:
            self.used = True
            yield self.first
            yield from self.stream
        elif isinstance(self.source, Iterator):  # generators, iter(list): one pass only
            raise InputError(problem("training stream", "a source that can be read again "
                                     "(this method reads it more than once)",
                                     "a one-shot iterator",
                                     "Pass a list of batches or an object whose __iter__ "
                                     "re-reads the chunks."))
        else:
            yield from self.source


def _n_out(n: int, fraction: float) -> int:
    """Rows to hold out of ``n``: rounded, leaving at least one for training."""
    return min(int(round(n * float(fraction))), n - 1)


def _own_state(fitted: Normaliser | None, held: np.ndarray, probe: np.ndarray) -> dict:
    state = {_OWN + "holdout": held, _OWN + "probe": probe,
             _OWN + "preprocessing": "" if fitted is None else json.dumps(fitted.to_attrs())}
    if fitted is not None:
        state.update({_OWN + "prep." + k: v for k, v in fitted.arrays().items()})
    return state


def _restore(state: dict) -> tuple[Normaliser | None, np.ndarray, np.ndarray]:
    missing = [k for k in ("holdout", "probe", "preprocessing") if _OWN + k not in state]
    if missing:
        raise InputError(problem("resume state", "a checkpoint passed by learn()",
                                 f"no {[_OWN + k for k in missing]}",
                                 "Resume with the state learn()'s checkpoint received."))
    attrs = state[_OWN + "preprocessing"]
    fitted = None
    if attrs:
        arrays = {k[len(_OWN + "prep."):]: v for k, v in state.items()
                  if k.startswith(_OWN + "prep.")}
        fitted = Normaliser.from_stored(json.loads(attrs), arrays)
    return (fitted, np.asarray(state[_OWN + "holdout"], dtype=np.float64),
            np.asarray(state[_OWN + "probe"], dtype=np.float64))


def _relative_error(
    X: np.ndarray, W: np.ndarray, coder: str, coder_options: dict
) -> tuple[float | None, list[int]]:
    """``Σ‖x − Wᵀz‖² / Σ‖x‖²`` over the rows of ``X`` (m, d), and rows using each atom.

    ``None`` and an empty list when ``X`` has no rows.
    """
    if X.shape[0] == 0:
        return None, []
    err, usage = 0.0, np.zeros(W.shape[0], dtype=np.int64)
    for start in range(0, X.shape[0], _PROBE_PIECE):  # pieces bound the coder's memory
        piece = X[start : start + _PROBE_PIECE]
        Z = coded(piece, W, coder, coder_options)
        err += float(residual_energy(piece, Z, W).sum())
        usage += atom_usage(Z)
    total = float(np.einsum("ij,ij->", X, X))
    return (err / total if total > 0 else 0.0), usage.tolist()
