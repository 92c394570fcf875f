"""A budgeted search over configurations of the records → features chain.

Which settings help is data-dependent, so the chain measures it on the data itself:

* :func:`candidates` — configurations around the shape defaults
  (:func:`~.shape_rules.default_settings`): the defaults first, then one value changed per
  searched axis, then (seeded) pairs of changes on two axes, up to a budget; every one passes
  :func:`~.shape_rules.check_settings`;
* :func:`rung_rows` — the rows of each rung: a seeded stratified order of the evaluated rows,
  each rung its first ``rows`` (so a later rung's rows include an earlier one's);
* :func:`score_trial` — one configuration scored in memory on some rows: per fold, a
  dictionary learned on that fold's training rows only, the fold's features made by
  :class:`~.features.FeatureChain`, the evaluation's classifier (:mod:`.classify`) fitted
  and its out-of-fold predictions compared with the raw-records classifier on the same
  rows and folds (paired bootstrap interval, :func:`~.scoring.paired_bootstrap`);
* :func:`rank` — trials best first: furthest rung, then score, then the cheaper.

Configurations are plain dicts (JSON), so they are logged and stored as recipes as they are.
No I/O here.
"""

from __future__ import annotations

import itertools
import time
from typing import Any

import numpy as np

from ..errors import AtomlineError, InputError, problem
from .classify import cross_predict, stratified_folds
from .coding import code_outputs, default_options
from .features import FeatureChain, sample_patches
from .learning import default_coder_options, learn, takes_coder
from .prep import Normaliser, PatchGeometry
from .scoring import paired_bootstrap
from .shape_rules import Settings, check_settings

__all__ = ["AXES", "candidates", "configuration", "rung_rows", "score_trial", "rank",
           "trial_cost"]

#: What a search may vary, each with the changes it tries (one value changed at a time).
AXES = {
    "patch": "patch size half and double the default (each with the default stride rule)",
    "atoms": "half and twice the default number of atoms",
    "learner": "k-means and random patches instead of the online learner",
    "coder": "omp with half and twice the nonzeros; soft threshold; the lasso by FISTA",
    "pooling": "one region; twice the regions per axis; mean instead of max",
    "normalisation": "no per-patch normalisation; ZCA whitening",
}

#: Chain settings a configuration holds besides those of :func:`~.shape_rules.check_settings`.
_CHAIN_KEYS = ("method", "coder", "coder_options", "reduce")


def configuration(settings: Settings, **chain: Any) -> dict:
    """A plain-JSON configuration: the shape settings' values plus learner, coder, reduction.

    Parameters
    ----------
    settings : Settings
    **chain
        ``method`` (default ``"online"``), ``coder`` (``"omp"``), ``coder_options``
        (``{"n_nonzero": settings.n_nonzero}`` for the greedy coders, the coder's own
        defaults otherwise), ``reduce`` (``"max"``).

    Returns
    -------
    dict
        Keys of :data:`~.shape_rules.SETTING_NAMES` (tuples as lists) and of the chain.
    """
    coder = chain.get("coder", "omp")
    options = chain.get("coder_options")
    if options is None:
        options = default_options(coder)
        if "n_nonzero" in options:
            options["n_nonzero"] = settings.n_nonzero
    values = {k: (list(v) if isinstance(v, tuple) else v) for k, v in settings.values().items()}
    return dict(values, method=chain.get("method", "online"), coder=coder,
                coder_options=dict(options), reduce=chain.get("reduce", "max"))


def _changes(base: Settings, axis: str) -> list[tuple[str, dict]]:
    """The changes one axis tries: (label, changed values)."""
    spatial = base.kind != "vectors"
    if axis == "patch":
        if not spatial:
            return []
        return [(f"patch {tuple(max(2, s // 2) for s in base.patch_size)}",
                 {"patch_size": tuple(max(2, s // 2) for s in base.patch_size)}),
                (f"patch {tuple(2 * s for s in base.patch_size)}",
                 {"patch_size": tuple(2 * s for s in base.patch_size)})]
    if axis == "atoms":
        return [(f"atoms {max(2, base.n_atoms // 2)}", {"n_atoms": max(2, base.n_atoms // 2)}),
                (f"atoms {2 * base.n_atoms}", {"n_atoms": 2 * base.n_atoms})]
    if axis == "learner":
        return [("learner kmeans", {"method": "kmeans"}),
                ("learner random-patches", {"method": "random-patches"})]
    if axis == "coder":
        half, double = max(1, base.n_nonzero // 2), 2 * base.n_nonzero
        return [(f"omp {half} nonzeros", {"n_nonzero": half}),
                (f"omp {double} nonzeros", {"n_nonzero": double}),
                ("threshold", {"coder": "threshold"}),
                ("fista", {"coder": "fista"})]
    if axis == "pooling":
        out = [("mean pooling", {"reduce": "mean"})]
        if spatial:
            out = [("regions 1", {"regions": 1}),
                   (f"regions {tuple(2 * r for r in base.regions)}",
                    {"regions": tuple(2 * r for r in base.regions)})] + out
        return out
    if axis == "normalisation":
        return [(f"normalise {'off' if base.normalise else 'on'}", {"normalise": not base.normalise}),
                (f"whiten {'off' if base.whiten else 'on'}", {"whiten": not base.whiten})]
    raise InputError(problem("search axis", f"one of {tuple(AXES)}", repr(axis),
                             "Pick listed axes."))


def _make(base: Settings, record_shape: tuple[int, ...], n_records: int, vectors: bool,
          change: dict) -> dict | None:
    """The configuration of the defaults with ``change`` applied, or None if it cannot work."""
    given = {k: v for k, v in change.items() if k not in _CHAIN_KEYS}
    chain = {k: v for k, v in change.items() if k in _CHAIN_KEYS}
    fixed = {"sample_patches": base.sample_patches}
    if base.kind != "vectors" and "patch_size" not in given:
        fixed.update(patch_size=base.patch_size, stride=base.stride)
    if "n_atoms" not in given:
        fixed["n_atoms"] = base.n_atoms
    try:
        settings = check_settings(record_shape, n_records, vectors=vectors, **{**fixed, **given})
    except AtomlineError:
        return None
    return configuration(settings, **chain)


def candidates(base: Settings, record_shape: tuple[int, ...], n_records: int, *,
               axes: tuple[str, ...], budget: int, seed: int, vectors: bool = False) -> list[dict]:
    """Configurations to search, the shape defaults first.

    Parameters
    ----------
    base : Settings
        The shape defaults of the records.
    record_shape : tuple of int
    n_records : int
        Rows the dictionaries will be learned from (a fold's training part), for the checks.
    axes : tuple of str
        Keys of :data:`AXES` to vary.
    budget : int
        Configurations at most (≥ 1).
    seed : int
        Seeds which single changes are kept when they exceed the budget and which pairs of
        changes fill it otherwise.
    vectors : bool
        The rank-1 records are feature vectors.

    Returns
    -------
    list of dict
        At most ``budget`` distinct configurations (:func:`configuration`), each with a
        ``label``; the first is the defaults. Changes that cannot work on this shape
        (:func:`~.shape_rules.check_settings` refuses them) are left out.
    """
    if budget < 1:
        raise InputError(problem("budget", "at least 1 configuration", str(budget),
                                 "Raise the budget."))
    rng = np.random.default_rng(seed)
    singles = [(axis, label, change) for axis in axes for label, change in _changes(base, axis)]
    found: list[dict] = [dict(configuration(base), label="defaults")]

    def add(label: str, change: dict) -> None:
        made = _make(base, record_shape, n_records, vectors, change)
        if made is not None and all(_key(made) != _key(c) for c in found):
            found.append(dict(made, label=label))

    order = rng.permutation(len(singles)) if len(singles) > budget - 1 else range(len(singles))
    for i in order:
        if len(found) >= budget:
            break
        add(singles[i][1], singles[i][2])
    pairs = [(a, b) for a, b in itertools.combinations(singles, 2) if a[0] != b[0]]
    for i in rng.permutation(len(pairs)):
        if len(found) >= budget:
            break
        a, b = pairs[int(i)]
        add(f"{a[1]} + {b[1]}", {**a[2], **b[2]})
    return found


def _key(config: dict) -> str:
    return repr(sorted((k, v) for k, v in config.items() if k != "label"))


def rung_rows(y: np.ndarray, sizes: list[int], seed: int) -> list[np.ndarray]:
    """Rows of each rung: prefixes of one seeded order that interleaves the classes.

    The order takes the classes in turn (each class's rows shuffled), so every prefix is
    stratified to within one row per class, and each rung's rows hold the earlier rungs'.

    Parameters
    ----------
    y : ndarray of shape (n,), int
        Labels of the evaluated rows.
    sizes : list of int
        Rows per rung, each at most ``n``.
    seed : int

    Returns
    -------
    list of ndarray of shape (size,), int64
        Sorted positions into ``y``.
    """
    rng = np.random.default_rng(seed)
    classes, y_num = np.unique(y, return_inverse=True)
    groups = [rng.permutation(np.flatnonzero(y_num == c)) for c in range(classes.size)]
    # Position within its class, scaled by the class's size: classes interleave in proportion.
    rank_in_class = np.empty(y.shape[0])
    for g in groups:
        rank_in_class[g] = (np.arange(g.size) + rng.random()) / g.size
    order = np.lexsort((y_num, rank_in_class))
    return [np.sort(order[:size]).astype(np.int64) for size in sizes]


def trial_cost(config: dict, n_rows: int, patches_per_record: int) -> float:
    """A deterministic cost of a trial: patches coded × atoms (its seconds vary run to run).

    Parameters
    ----------
    config : dict
    n_rows : int
    patches_per_record : int

    Returns
    -------
    float
    """
    return float(n_rows) * float(patches_per_record) * float(config["n_atoms"])


def _geometry(config: dict, record_shape: tuple[int, ...]) -> PatchGeometry:
    size = config.get("patch_size")
    stride = config.get("stride")
    return PatchGeometry.for_records(tuple(record_shape), None if size is None else tuple(size),
                                     None if stride is None else tuple(stride))


def fit_chain(config: dict, records: np.ndarray, seed: int) -> FeatureChain:
    """Learn the configuration's dictionary on some records and return its feature chain.

    Parameters
    ----------
    config : dict
        A configuration (:func:`configuration`).
    records : ndarray of shape (n, *record_shape), floating
        The training records (only these are seen).
    seed : int

    Returns
    -------
    FeatureChain
        Coded in float64, split-sign pooling.
    """
    geometry = _geometry(config, records.shape[1:])
    n_atoms = int(config["n_atoms"])
    patches = sample_patches(records.shape[0], geometry, int(config["sample_patches"]), seed,
                             chunk_rows=records.shape[0], read=lambda c: records)
    if patches.shape[0] < n_atoms:
        raise InputError(problem("search rows", f"at least n_atoms = {n_atoms} patches",
                                 f"{patches.shape[0]} patches", "Search on more rows."))
    prep = Normaliser(remove_mean=config["normalise"], contrast=config["normalise"],
                      whiten=config["whiten"])
    coder, coder_options = config["coder"], dict(config["coder_options"])
    if "n_nonzero" in coder_options:
        # More nonzeros than atoms or than patch values cannot be chosen.
        coder_options["n_nonzero"] = int(min(coder_options["n_nonzero"], n_atoms,
                                             geometry.n_features))
    extra: dict = {}
    if takes_coder(config["method"]):
        extra = {"coder": coder, "coder_options": default_coder_options(coder, coder_options)}
    learned = learn(patches, n_atoms, config["method"], preprocessing=prep, holdout=0.0,
                    seed=seed, **extra)
    return FeatureChain(geometry, learned.atoms, coder, coder_options, learned.preprocessing,
                        regions=tuple(config["regions"]), reduce=config["reduce"],
                        split_sign=True, dtype=np.float64)


def score_trial(config: dict, records: np.ndarray, y: np.ndarray, *, folds: int, seed: int,
                raw_pred: np.ndarray | None = None, classifier: str = "logistic",
                C: float = 1.0, n_boot: int = 500) -> dict:
    """Cross-validated accuracy of one configuration's features, beside the raw records'.

    Parameters
    ----------
    config : dict
        A configuration (:func:`configuration`).
    records : ndarray of shape (n, *record_shape), floating
        The trial's rows.
    y : ndarray of shape (n,), int
        Class numbers ``0 .. c-1``.
    folds : int
        Stratified folds (seeded by ``seed``; the same rows give the same folds).
    seed : int
        Seeds the folds, each fold's patch sample and learner, and the bootstrap.
    raw_pred : ndarray of shape (n,), int, optional
        Out-of-fold predictions of the raw-records classifier on the same rows and folds;
        computed when omitted.
    classifier, C
        The evaluation's classifier (:func:`~.classify.make_classifier`).
    n_boot : int
        Bootstrap resamples of the interval.

    Returns
    -------
    dict
        ``score`` (accuracy), ``raw`` (the raw classifier's), ``low``/``high`` (95 %
        percentile interval of ``score − raw``), ``seconds``, ``rows``, ``n_features``.
        A configuration that fails on these rows scores ``-1`` with its ``error``.
    """
    start = time.perf_counter()
    split = stratified_folds(y, folds, seed)
    n_classes = int(y.max()) + 1
    flat = records.reshape(records.shape[0], -1).astype(np.float64)
    if raw_pred is None:
        raw_pred, _ = cross_predict(flat, y, split, classifier=classifier, C=C, seed=seed)
    pred = np.full(y.shape[0], -1, dtype=np.int64)
    n_features = 0
    try:
        for f, (train, test) in enumerate(split):
            chain = fit_chain(config, records[train], seed + f)
            X = chain.features(records).astype(np.float64)
            n_features = int(X.shape[1])
            fold_pred, _ = cross_predict(X, y, [(train, test)], classifier=classifier, C=C,
                                         seed=seed)
            pred[test] = fold_pred[test]
    except (AtomlineError, ValueError, np.linalg.LinAlgError) as exc:
        # A configuration the data cannot carry is the worst trial, not a failed search.
        return {"score": -1.0, "raw": float(np.mean(raw_pred == y)), "low": -1.0, "high": -1.0,
                "seconds": time.perf_counter() - start, "rows": int(y.shape[0]),
                "n_features": 0, "error": str(exc)}
    boot = paired_bootstrap(y, pred, raw_pred, n_classes, n_boot=n_boot, seed=seed)["accuracy"]
    return {"score": float(boot["a"]), "raw": float(boot["b"]), "low": float(boot["low"]),
            "high": float(boot["high"]), "seconds": time.perf_counter() - start,
            "rows": int(y.shape[0]), "n_features": n_features}


def rank(trials: list[dict]) -> list[dict]:
    """Trials best first: the furthest rung, then the higher score, then the cheaper, then
    the configuration's position (so equal runs rank equally).

    Parameters
    ----------
    trials : list of dict
        Each with ``rung``, ``score``, ``cost`` and ``position``.

    Returns
    -------
    list of dict
        The same dicts, reordered.
    """
    return sorted(trials, key=lambda t: (-t["rung"], -t["score"], t["cost"], t["position"]))
