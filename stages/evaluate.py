"""The evaluate stage: does a linear classifier do better on the sparse features?

Protocol
--------
1. **Rows.** All labelled records, or a stratified seeded sample of ``max_rows`` of them
   (so memory stays bounded on a large archive). The rows depend only on the labels,
   ``max_rows`` and the seed.
2. **Folds.** Stratified ``folds``-fold cross-validation, shuffled with the seed. Every
   row is predicted exactly once, by the model that did not see it ("out-of-fold"
   predictions); scores are computed on those predictions over all rows.
3. **Classifier.** Standardisation fitted on the training folds, then a linear
   scikit-learn classifier: ``"logistic"`` (``LogisticRegression``, the default) or
   ``"linear-svm"`` (``LinearSVC``), both L2-regularised with strength ``1/C``.
4. **Feature sets**, all through the same rows, folds and classifier:

   ``features``        the pooled sparse codes ``features/<dict-id>/<records>``;
   ``raw``             the records themselves, flattened;
   ``random_patches``  a dictionary of the same size made of patches drawn at random
                       from the records (normalised like the training patches),
                       coded with the same coder and pooled the same way;
   ``pca``             the leading ``min(k, d)`` principal directions of a patch sample
                       as the dictionary, coded and pooled the same way.

   The two dictionary baselines are built here from the records with
   :func:`baseline_atoms` (plain numpy), then coded and pooled with the project's own
   kernels; like the learned dictionary they never see labels.
5. **Scores**: accuracy, balanced accuracy, macro-F1 (see :mod:`.scoring`), a per-class
   report and the confusion matrix of every set; per-fold accuracies.
6. **Intervals**: for every baseline, a paired percentile bootstrap over the rows of
   the difference ``features − baseline`` (:func:`.scoring.paired_bootstrap`). The
   interval reflects which rows were sampled, not the randomness of training.
7. **Learning curve**: the same folds with each training part cut (stratified, seeded)
   to a share of its rows; accuracy of ``features`` and ``raw`` against the number of
   labelled training rows.

Each evaluation is appended to ``evaluations/<run-id>`` (never rewritten) with which
dictionary, coder, pooling and data it measured, and its out-of-fold predictions, so two
evaluations on the same rows can be compared later. It is keyed by what it measures
(:func:`evaluation_key`): a rerun with the same inputs returns the complete evaluation
with that key (``reused`` in the manifest) instead of adding a second one (:func:`compare_evaluations`, used by
the nightly promotion gate, :func:`gate_decision`).

``evaluate_task`` is :func:`evaluate_features` as a Prefect task.
"""

from __future__ import annotations

from typing import Iterator

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import precision_recall_fscore_support
from sklearn.model_selection import StratifiedKFold, train_test_split
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import LinearSVC
from threadpoolctl import threadpool_limits

from .kernels.coding import code, gram
from .encode import codes_path
from .checks import check_folds, check_tolerance
from .errors import BadChunk, InputError, problem
from .pool import features_path, pool_codes, region_of_patches
from .kernels.prep import Normaliser, PatchGeometry
from .kernels.scoring import confusion, paired_bootstrap, scores_from_confusion
from .options import BASELINES, CLASSIFIERS, DEFAULT_CURVE, EvaluateOptions
from .workspace import Workspace, fingerprint_params, iter_row_chunks

__all__ = ["evaluate_features", "evaluate_task", "evaluation_key", "cross_predict", "make_classifier",
           "baseline_atoms", "compare_evaluations", "gate_decision", "CLASSIFIERS",
           "BASELINES", "GATE_OUTCOMES"]

# CLASSIFIERS, BASELINES and DEFAULT_CURVE are declared with the options; on the learning
# curve the full share is the main result and is added to the curve.
#: Patches drawn from the evaluated rows to build the random-patch and PCA dictionaries.
_BASELINE_SAMPLE = 20_000


def make_classifier(classifier: str = "logistic", *, C: float = 1.0, seed: int = 0) -> Pipeline:
    """The evaluation's classifier: standardisation, then a linear model.

    Parameters
    ----------
    classifier : {"logistic", "linear-svm"}
    C : float
        Inverse L2 regularisation strength.
    seed : int

    Returns
    -------
    sklearn.pipeline.Pipeline
    """
    if classifier == "logistic":
        model = LogisticRegression(C=C, max_iter=2000, random_state=seed)
    elif classifier == "linear-svm":
        model = LinearSVC(C=C, max_iter=5000, random_state=seed)
    else:
        raise InputError(problem("classifier", f"one of {CLASSIFIERS}", repr(classifier),
                                 "Pick a listed classifier."))
    return make_pipeline(StandardScaler(), model)


def cross_predict(
    X: np.ndarray, y: np.ndarray, folds: list[tuple[np.ndarray, np.ndarray]], *,
    classifier: str = "logistic", C: float = 1.0, seed: int = 0,
) -> tuple[np.ndarray, list[float]]:
    """Out-of-fold predictions.

    Parameters
    ----------
    X : ndarray of shape (n, F)
    y : ndarray of shape (n,), int
    folds : list of (train positions, test positions)
        Positions into ``X``; the test parts cover every row once.
    classifier, C, seed
        As :func:`make_classifier`.

    Returns
    -------
    pred : ndarray of shape (n,), int64
    fold_accuracy : list of float
        Accuracy on each fold's test part.
    """
    pred = np.full(y.shape[0], -1, dtype=np.int64)
    fold_accuracy = []
    for train, test in folds:
        model = make_classifier(classifier, C=C, seed=seed).fit(X[train], y[train])
        pred[test] = model.predict(X[test])
        fold_accuracy.append(float(np.mean(pred[test] == y[test])))
    return pred, fold_accuracy


def baseline_atoms(kind: str, patches: np.ndarray, n_atoms: int, seed: int = 0) -> np.ndarray:
    """A dictionary that needs no learning, for the baselines.

    Parameters
    ----------
    kind : {"random_patches", "pca"}
        ``random_patches``: ``n_atoms`` rows of ``patches`` drawn without replacement
        (seeded) among those of non-zero norm, scaled to unit norm.
        ``pca``: the leading ``min(n_atoms, d)`` right singular vectors of the centred
        patches (unit norm, orthogonal).
    patches : ndarray of shape (m, d)
        Preprocessed patches.
    n_atoms : int
    seed : int

    Returns
    -------
    ndarray of shape (k', d), float64
        ``k' = n_atoms`` for random patches, ``min(n_atoms, d, m)`` for PCA.
    """
    patches = np.asarray(patches, dtype=np.float64)
    if kind == "random_patches":
        norms = np.linalg.norm(patches, axis=1)
        usable = np.flatnonzero(norms > 1e-8 * max(float(norms.max(initial=0)), 1e-300))
        if usable.size == 0:
            raise InputError(problem("baseline patches", "some non-constant patches",
                                     "only zero patches", "Check the records."))
        rng = np.random.default_rng(seed)
        pick = rng.choice(usable, size=n_atoms, replace=usable.size < n_atoms)
        return patches[pick] / norms[pick, None]
    if kind == "pca":
        centred = patches - patches.mean(axis=0)
        _, _, vt = np.linalg.svd(centred, full_matrices=False)
        return vt[: min(n_atoms, vt.shape[0])]
    raise InputError(problem("baseline dictionary", "'random_patches' or 'pca'", repr(kind),
                             "Pick a listed baseline."))


def evaluate_features(
    workspace: Workspace | str,
    records: str,
    dict_id: str,
    options: EvaluateOptions = EvaluateOptions(),
    *,
    labels: str | None = None,
    tag: str = "",
    blas_threads: int | None = 1,
) -> dict:
    """Evaluate pooled features against the baselines and append the result.

    Parameters
    ----------
    workspace : Workspace or str
    records : str
    dict_id : str
        Features ``features/<dict_id>/<records>`` must be complete.
    options : EvaluateOptions
        ``folds`` (stratified, ≥ 2; every class needs at least this many rows),
        ``classifier`` ({"logistic", "linear-svm"}) and its ``C``, ``max_rows`` (at most
        this many labelled rows, a stratified seeded sample), ``seed`` (the row sample,
        the folds, the baselines and the bootstrap), ``baselines`` (any of
        :data:`BASELINES`; empty for none), ``learning_curve`` (shares in (0, 1) of each
        fold's training rows; empty for no curve), ``n_boot`` (bootstrap resamples for the
        intervals), ``on_bad_chunk`` (below).
    labels : str, optional
        Name of the labels array; defaults to ``records``.
    tag : str
        Free text stored with the evaluation (e.g. ``"candidate"``).
    blas_threads : int, optional
        BLAS threads while fitting and coding; ``None`` leaves the library's default.
        The classifiers' matrices are small, so one thread loses little and avoids
        oversubscribing cores shared with other workers (on the 2-core test machine under
        load, one evaluation of the digits took ~3 s with one thread and ~30 s with two).
    options.on_bad_chunk : {"stop", "skip"}
        A features chunk that cannot be decoded raises
        :class:`~atomline.stages.errors.BadChunk` naming it, or (``"skip"``) its rows are
        left out like those of skipped chunks and counted in ``rows_lacking``. A bad
        records chunk read for a baseline always stops, naming it.

    Returns
    -------
    dict
        ``run_id``, ``dict_id``, ``n_rows``, ``folds``, ``coder``, ``pooling``; one
        score dict per feature set (``features``, ``raw``, …: accuracy,
        balanced_accuracy, macro_f1, fold_accuracy); ``versus`` (per baseline, per
        score: difference features − baseline with its interval); ``learning_curve``;
        ``reused`` (True when a complete evaluation with the same key was found and
        returned instead of evaluating again).
    """
    # Every option was checked when ``options`` was made (EvaluateOptions.__post_init__).
    folds, classifier, C, max_rows = options.folds, options.classifier, options.C, options.max_rows
    seed, baselines, learning_curve = options.seed, options.baselines, options.learning_curve
    n_boot, on_bad_chunk = options.n_boot, options.on_bad_chunk
    ws = workspace if isinstance(workspace, Workspace) else Workspace.open(workspace)
    out = ws.output(features_path(dict_id, records))
    if not out.complete:
        raise InputError(problem(features_path(dict_id, records), "complete features",
                                 f"{int((~out.done_flags()).sum())} chunk(s) not pooled",
                                 "Run the encode and pool flows first."))
    labels_name = labels or records
    y_all = ws.labels(labels_name)
    n_records = out.group["values"].shape[0]
    if y_all.shape[0] != n_records:
        raise InputError(problem(f"labels {labels_name!r}", f"{n_records} labels (one per record)",
                                 str(y_all.shape[0]), "Add labels for these records (overwrite=True)."))
    lacking = _skipped_rows(out, n_records)
    if on_bad_chunk == "skip":  # leave out the rows of features chunks that do not decode
        lacking = np.union1d(lacking, _unreadable_rows(out))
    rows = _labelled_rows(y_all, max_rows, seed, folds, exclude=lacking)
    rows_fingerprint = fingerprint_params({"rows": rows.tolist(), "y": y_all[rows].tolist()})
    protocol = {"classifier": classifier, "C": C, "folds": folds, "seed": seed,
                "max_rows": max_rows, "n_boot": n_boot}
    key = evaluation_key(records=records, labels=labels_name, dict_id=dict_id,
                         records_fingerprint=ws.records_fingerprint(records),
                         features_fingerprint=out.attrs["fingerprint"], rows_fingerprint=rows_fingerprint,
                         protocol=protocol, baselines=baselines, learning_curve=learning_curve, tag=tag)
    earlier = ws.find_evaluation(key)
    if earlier is not None:
        return _manifest(earlier, reused=True)
    classes, y = np.unique(y_all[rows], return_inverse=True)
    n_classes = classes.size
    splitter = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
    fold_parts = list(splitter.split(np.zeros(rows.size), y))
    fit = dict(classifier=classifier, C=C, seed=seed)

    predictions: dict[str, np.ndarray] = {}
    fold_scores: dict[str, list[float]] = {}
    curve_inputs: dict[str, np.ndarray] = {}
    sets = ("features",) + tuple(b for b in BASELINES if b in baselines)
    with threadpool_limits(limits=blas_threads):
        for name in sets:
            X = _feature_set(ws, name, records, dict_id, rows, seed)
            predictions[name], fold_scores[name] = cross_predict(X, y, fold_parts, **fit)
            if learning_curve and name in ("features", "raw"):
                curve_inputs[name] = _curve(X, y, fold_parts, learning_curve, seed, fit)
            del X  # one feature set in memory at a time

    metrics, per_class, arrays = {}, {}, {"rows": rows}
    for name, pred in predictions.items():
        conf = confusion(y, pred, n_classes)
        metrics[name] = {k: float(v) for k, v in scores_from_confusion(conf).items()}
        metrics[name]["fold_accuracy"] = fold_scores[name]
        per_class[name] = _per_class(y, pred, classes)
        arrays[f"pred_{name}"] = classes[pred]
        arrays[f"confusion_{name}"] = conf
    versus = {b: paired_bootstrap(y, predictions["features"], predictions[b], n_classes,
                                  n_boot=n_boot, seed=seed)
              for b in sets[1:]}
    curve = _curve_report(curve_inputs, metrics, fold_parts, learning_curve)

    fattrs = out.attrs
    cattrs = ws.output(codes_path(dict_id, records)).attrs
    attrs = {
        "records": records,
        "labels": labels_name,
        "dict_id": dict_id,
        "records_fingerprint": ws.records_fingerprint(records),
        "dictionary_fingerprint": cattrs["dictionary_fingerprint"],
        "features_fingerprint": fattrs["fingerprint"],
        "rows_fingerprint": rows_fingerprint,
        "coder": fattrs["coder"],
        "coder_options": cattrs["params"]["coder_options"],
        "pooling": fattrs["params"],
        "protocol": protocol,
        "classes": classes.tolist(),
        "n_rows": int(rows.size),
        "rows_lacking": int(lacking.size),
        "tag": tag,
        "metrics": metrics,
        "per_class": per_class,
        "versus": versus,
        "learning_curve": curve,
    }
    run_id = ws.append_evaluation(attrs, arrays, key=key)
    return _manifest(ws.evaluation(run_id), reused=False)


def evaluation_key(*, records: str, labels: str, dict_id: str, records_fingerprint: str,
                   features_fingerprint: str, rows_fingerprint: str, protocol: dict,
                   baselines, learning_curve, tag: str) -> str:
    """What an evaluation measures, as a digest: equal keys give equal evaluations.

    The features' fingerprint covers the dictionary, the coder and the pooling; the rows'
    fingerprint covers the labels, ``max_rows``, the seed and rows lacking features;
    ``protocol`` holds the classifier options, folds, seed and bootstrap size. The
    ``tag`` is part of it because the history reads candidates and promoted-dictionary
    evaluations apart. BLAS threads are not: they do not change the result.

    Returns
    -------
    str
        16 hex digits (:func:`fingerprint_params`).
    """
    return fingerprint_params({
        "records": records, "labels": labels, "dict_id": dict_id,
        "records_fingerprint": records_fingerprint, "features_fingerprint": features_fingerprint,
        "rows_fingerprint": rows_fingerprint, "protocol": protocol,
        "baselines": [b for b in BASELINES if b in baselines],
        "learning_curve": [float(s) for s in learning_curve], "tag": tag})


def _manifest(attrs: dict, *, reused: bool) -> dict:
    """The stage's manifest from a stored evaluation's attributes (new or found again)."""
    manifest = {"run_id": attrs["run_id"], "dict_id": attrs["dict_id"], "n_rows": attrs["n_rows"],
                "rows_lacking": attrs["rows_lacking"], "folds": attrs["protocol"]["folds"],
                "coder": attrs["coder"], "pooling": attrs["pooling"], "tag": attrs["tag"],
                "versus": attrs["versus"], "learning_curve": attrs["learning_curve"], "reused": reused}
    manifest.update(attrs["metrics"])
    return manifest


def compare_evaluations(
    workspace: Workspace | str, run_a: str, run_b: str, *, n_boot: int = 2000, seed: int = 0,
) -> dict[str, dict[str, float]]:
    """Paired bootstrap of the features' scores of two evaluations on the same rows.

    Parameters
    ----------
    workspace : Workspace or str
    run_a, run_b : str
        Evaluation run ids; both must have scored the same rows with the same labels
        (same ``rows_fingerprint``), e.g. two dictionaries evaluated with the same seed.
    n_boot, seed
        As :func:`.scoring.paired_bootstrap`.

    Returns
    -------
    dict
        Per score: ``a``, ``b``, ``difference`` (a − b), ``low``, ``high``.
    """
    ws = workspace if isinstance(workspace, Workspace) else Workspace.open(workspace)
    info = {e["run_id"]: e for e in ws.evaluations() if e["run_id"] in (run_a, run_b)}
    for run in (run_a, run_b):
        if run not in info:
            raise InputError(problem(f"evaluations/{run}", "a complete evaluation", "none",
                                     "Pass run ids from the evaluation history."))
    if info[run_a]["rows_fingerprint"] != info[run_b]["rows_fingerprint"]:
        raise InputError(problem(f"evaluations {run_a} and {run_b}", "the same rows and labels",
                                 "different rows (other seed, max_rows, or data)",
                                 "Evaluate both with the same seed and max_rows."))
    a, b = ws.evaluation_arrays(run_a), ws.evaluation_arrays(run_b)
    classes = np.asarray(info[run_a]["classes"])
    y = np.searchsorted(classes, ws.labels(info[run_a]["labels"])[a["rows"]])
    code_of = lambda pred: np.searchsorted(classes, pred)  # noqa: E731 - two uses below
    return paired_bootstrap(y, code_of(a["pred_features"]), code_of(b["pred_features"]),
                            classes.size, n_boot=n_boot, seed=seed)


#: The promotion gate's verdicts on a candidate compared with the promoted dictionary.
GATE_OUTCOMES = {
    "promoted": "not worse than the promoted dictionary beyond the tolerance, and the "
                "interval's lower end agrees",
    "inconclusive": "within the tolerance, but the interval reaches below it: the evidence "
                    "is too thin to replace the promoted dictionary",
    "regression": "worse than the promoted dictionary by more than the tolerance",
}


def gate_decision(comparison: dict[str, float], tolerance: float) -> str:
    """Decide promotion from a paired comparison (candidate = a, promoted = b).

    With ``d`` the candidate's score minus the promoted one's and ``[low, high]`` its
    bootstrap interval:

    * ``regression`` when ``d < -tolerance``;
    * ``promoted`` when ``d >= -tolerance`` and ``low >= -tolerance`` (a non-inferiority
      test with margin ``tolerance`` at the interval's level);
    * ``inconclusive`` otherwise.

    Parameters
    ----------
    comparison : dict
        One score's entry of :func:`compare_evaluations` (``difference``, ``low``).
    tolerance : float
        Margin, ≥ 0, in score units (0.01 = one accuracy point).

    Returns
    -------
    str
        A key of :data:`GATE_OUTCOMES`.
    """
    check_tolerance(tolerance)
    if comparison["difference"] < -tolerance:
        return "regression"
    return "promoted" if comparison["low"] >= -tolerance else "inconclusive"


# ---------------------------------------------------------------------------- helpers
def _skipped_rows(out, n_records: int) -> np.ndarray:
    """Rows whose features are missing because their input chunk was skipped."""
    rows_per_chunk = out.group["values"].chunks[0]
    parts = [np.arange(c * rows_per_chunk, min(n_records, (c + 1) * rows_per_chunk))
             for c in out.skipped_chunks()]
    return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)


def _labelled_rows(y: np.ndarray, max_rows: int, seed: int, folds: int,
                   exclude: np.ndarray | None = None) -> np.ndarray:
    """Sorted row numbers to use: all rows but ``exclude``, or a stratified seeded subsample."""
    keep = np.ones(y.shape[0], dtype=bool)
    if exclude is not None:
        keep[exclude] = False
    check_folds(y[keep], folds)
    rows = np.flatnonzero(keep)
    if rows.size > max_rows:
        rows, _ = train_test_split(rows, train_size=max_rows, stratify=y[rows], random_state=seed)
    return np.sort(rows)


def _row_blocks(arr, rows: np.ndarray, read) -> Iterator[np.ndarray]:
    """The given sorted rows of ``arr``, one block per row chunk that holds some.

    ``read(chunk, rows_slice)`` reads one chunk and names it if it is bad
    (``Workspace.read_chunk`` for records, ``Output.read`` for features).
    """
    for c, sl in iter_row_chunks(arr):
        inside = rows[(rows >= sl.start) & (rows < sl.stop)]
        if inside.size:
            yield read(c, sl)[inside - sl.start]


def _take_rows(arr, rows: np.ndarray, read) -> np.ndarray:
    """Read the given sorted rows chunk by chunk (never the whole array at once)."""
    return np.concatenate(list(_row_blocks(arr, rows, read)))


def _records_reader(ws: Workspace, records: str, arr):
    return lambda c, sl: ws.read_chunk(records, c, arr)


def _unreadable_rows(out) -> np.ndarray:
    """Rows of the features' chunks that cannot be decoded (one read of every chunk)."""
    arr = out.group["values"]
    parts = []
    for _, sl in iter_row_chunks(arr):
        try:
            out.read("values", sl)
        except BadChunk:
            parts.append(np.arange(sl.start, sl.stop))
    return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)


def _feature_set(ws: Workspace, name: str, records: str, dict_id: str, rows: np.ndarray,
                 seed: int) -> np.ndarray:
    """ndarray of shape (len(rows), F_name), float32: one feature set of the rows."""
    if name == "features":
        out = ws.output(features_path(dict_id, records))
        return _take_rows(out.group["values"], rows, lambda c, sl: out.read("values", sl))
    arr = ws.records(records)
    if name == "raw":
        return _take_rows(arr, rows, _records_reader(ws, records, arr)).reshape(rows.size, -1).astype(np.float32)
    return _dictionary_baseline(ws, name, arr, records, dict_id, rows, seed)


def _dictionary_baseline(ws: Workspace, kind: str, arr, records: str, dict_id: str,
                         rows: np.ndarray, seed: int) -> np.ndarray:
    """Features from a random-patch or PCA dictionary, coded and pooled like the real ones."""
    stored = ws.load_dictionary(dict_id)
    cattrs = ws.output(codes_path(dict_id, records)).attrs
    pooling = ws.output(features_path(dict_id, records)).attrs["params"]
    geometry = PatchGeometry.from_attrs(stored.attrs["geometry"])
    normaliser = Normaliser.from_stored(stored.attrs["preprocessing"], stored.arrays)
    rng = np.random.default_rng(seed)
    P = geometry.patches_per_record
    n_sample_rows = min(rows.size, max(1, -(-_BASELINE_SAMPLE // P) * 2))
    sample_rows = np.sort(rng.choice(rows, size=n_sample_rows, replace=False))
    patches = normaliser.apply(geometry.extract(
        _take_rows(arr, sample_rows, _records_reader(ws, records, arr))).astype(np.float64))
    if patches.shape[0] > _BASELINE_SAMPLE:
        patches = patches[rng.choice(patches.shape[0], _BASELINE_SAMPLE, replace=False)]
    atoms = baseline_atoms(kind, patches, stored.atoms.shape[0], seed)
    coder, options = cattrs["params"]["coder"], dict(cattrs["params"]["coder_options"])
    if "n_nonzero" in options:
        options["n_nonzero"] = min(options["n_nonzero"], atoms.shape[0])
    region, R = region_of_patches(geometry.grid, pooling["regions"])
    blocks = []
    for block in _row_blocks(arr, rows, _records_reader(ws, records, arr)):
        X = normaliser.apply(geometry.extract(block))
        W = atoms.astype(X.dtype)
        extra = {"gram": gram(W)} if coder == "omp" else {}
        codes = code(X, W, coder, **options, **extra)
        blocks.append(pool_codes(codes.index, codes.value, n_atoms=W.shape[0],
                                 patch_region=region, n_regions=R,
                                 reduce=pooling["reduce"], split_sign=pooling["split_sign"]))
    return np.concatenate(blocks)


def _per_class(y: np.ndarray, pred: np.ndarray, classes: np.ndarray) -> dict:
    """Precision, recall, F1 and support per class (keys are the class labels)."""
    p, r, f, s = precision_recall_fscore_support(y, pred, labels=np.arange(classes.size),
                                                 zero_division=0)
    return {str(c): {"precision": float(p[i]), "recall": float(r[i]), "f1": float(f[i]),
                     "support": int(s[i])} for i, c in enumerate(classes.tolist())}


def _curve(X: np.ndarray, y: np.ndarray, fold_parts: list, shares, seed: int, fit: dict) -> np.ndarray:
    """ndarray of shape (len(shares), 2): mean training rows and mean accuracy per share."""
    out = np.zeros((len(shares), 2))
    n_classes = np.unique(y).size
    for i, share in enumerate(shares):
        sizes, scores = [], []
        for train, test in fold_parts:
            n_keep = max(int(round(share * train.size)), 2 * n_classes)
            if n_keep >= train.size:
                kept = train
            else:
                kept, _ = train_test_split(train, train_size=n_keep, stratify=y[train],
                                           random_state=seed)
            model = make_classifier(**fit).fit(X[kept], y[kept])
            scores.append(float(np.mean(model.predict(X[test]) == y[test])))
            sizes.append(kept.size)
        out[i] = np.mean(sizes), np.mean(scores)
    return out


def _curve_report(inputs: dict[str, np.ndarray], metrics: dict, fold_parts: list, shares) -> dict:
    """Plain-JSON learning curve: shares, training rows, accuracy per set (full share last)."""
    if not inputs:
        return {}
    full_rows = float(np.mean([train.size for train, _ in fold_parts]))
    report = {"shares": [float(s) for s in shares] + [1.0],
              "train_rows": [float(v) for v in inputs["features"][:, 0]] + [full_rows]}
    for name, values in inputs.items():
        report[name] = [float(v) for v in values[:, 1]] + [float(np.mean(metrics[name]["fold_accuracy"]))]
    return report


#: The evaluate stage as a Prefect task.
evaluate_task = task(evaluate_features, name="evaluate-features", cache_policy=NO_CACHE)
