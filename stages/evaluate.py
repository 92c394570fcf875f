"""The evaluate stage: does a linear classifier do better on the sparse features?

Protocol
--------
1. **Rows.** All labelled records, or a stratified seeded sample of ``max_rows`` of them
   (so memory stays bounded on a large archive). The rows depend only on the labels,
   ``max_rows`` and the seed.
2. **Split** (option ``split``, :data:`~atomline.stages.options.SPLITS`):

   ``kfold``     (the default) stratified ``folds``-fold cross-validation, shuffled with
                 the seed. Every row is predicted exactly once, by the model that did not
                 see it ("out-of-fold" predictions); scores are over all rows.
   ``test-set``  the classifier is fitted on the rows of 1. and scores every row of the
                 named ``test_records`` (labels of the same name) that has features; the
                 test records must have rows of the records' shape and features pooled by
                 the same dictionary, coder and pooling (:func:`~.checks.check_test_records`; the
                 flows encode and pool them).
   ``time``      row order is time: the rows of 1. are the newest ``max_rows`` (not a
                 sample), the older ones train and the newest ``ceil(test_share · n)``
                 are scored.

   Every feature set, the bootstrap and the learning curve use the same split; scores,
   intervals and confusion matrices are over the scored rows only.
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

   The two dictionary baselines are built from a sample of the evaluated records' patches
   (:func:`~atomline.stages.kernels.features.sample_patches`) by the learners
   ``random-patches`` and ``pca``
   (:func:`~atomline.stages.kernels.features.baseline_atoms`), then coded and pooled by
   :class:`~atomline.stages.kernels.features.FeatureChain`; like the learned dictionary
   they never see labels.
5. **Scores**: accuracy, balanced accuracy, macro-F1 (see :mod:`.scoring`), a per-class
   report and the confusion matrix of every set; per-fold accuracies.
6. **Intervals**: for every baseline, a paired percentile bootstrap over the rows of
   the difference ``features − baseline`` (:func:`.scoring.paired_bootstrap`), over the
   scored rows. The
   interval reflects which rows were sampled, not the randomness of training.
7. **Learning curve**: the same folds with each training part cut (stratified, seeded)
   to a share of its rows; accuracy of ``features`` and of every baseline against the
   number of labelled training rows.

Each evaluation is appended to ``evaluations/<run-id>`` (never rewritten) with which
dictionary, coder, pooling and data it measured, the split (``protocol``: ``split``,
``test_records``, ``test_share``; ``scored_records`` and ``scored_labels`` name whose rows
the stored ``rows`` and predictions are), and its predictions, so two
evaluations on the same rows can be compared later. It is keyed by what it measures
(:func:`evaluation_key`): a rerun with the same inputs returns the complete evaluation
with that key (``reused`` in the manifest) instead of adding a second one. The nightly
promotion gate compares two such evaluations (:mod:`.gate`).

``evaluate_task`` is :func:`evaluate_features` as a Prefect task.
"""

from __future__ import annotations

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE
from threadpoolctl import threadpool_limits

from .checks import check_test_records
from .encode import codes_path
from .errors import BadChunk, InputError, problem
from .pool import features_path
from .kernels.classify import (class_report, cross_predict, curve_points, curve_report,
                               holdout_split, labelled_rows, make_classifier, scored_positions,
                               stratified_folds, time_split)
from .kernels.features import FeatureChain, baseline_atoms, row_blocks, sample_patches, take_rows
from .kernels.scoring import confusion, paired_bootstrap, scores_from_confusion
from .options import BASELINES, CLASSIFIERS, DEFAULT_CURVE, EncodeOptions, EvaluateOptions, PoolOptions
from .workspace import Workspace, fingerprint_params, iter_row_chunks, open_workspace

__all__ = ["evaluate_features", "evaluate_task", "evaluation_key", "coding_of",
           "CLASSIFIERS", "BASELINES"]

# CLASSIFIERS, BASELINES and DEFAULT_CURVE are declared with the options; on the learning
# curve the full share is the main result and is added to the curve.
#: Patches drawn from the evaluated rows to build the random-patch and PCA dictionaries.
_BASELINE_SAMPLE = 20_000


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
        ``split`` ({"kfold", "test-set", "time"}, see the module's protocol) with its
        ``test_records`` / ``test_share``, ``folds`` (stratified, ≥ 2; every class needs
        at least this many rows; k-fold only),
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
        ``run_id``, ``dict_id``, ``n_rows`` (rows scored), ``n_train`` (rows the classifier
        learnt from; all rows for k-fold), ``split``, ``test_records``, ``folds``,
        ``coder``, ``pooling``; one
        score dict per feature set (``features``, ``raw``, …: accuracy,
        balanced_accuracy, macro_f1, fold_accuracy); ``versus`` (per baseline, per
        score: difference features − baseline with its interval); ``learning_curve``;
        ``reused`` (True when a complete evaluation with the same key was found and
        returned instead of evaluating again).
    """
    # Every option was checked when ``options`` was made (EvaluateOptions.__post_init__).
    folds, classifier, C, max_rows = options.folds, options.classifier, options.C, options.max_rows
    seed, baselines, learning_curve = options.seed, options.baselines, options.learning_curve
    n_boot, on_bad_chunk, split = options.n_boot, options.on_bad_chunk, options.split
    ws = open_workspace(workspace)
    test_records = options.test_records if split == "test-set" else None
    if test_records is not None:
        check_test_records(ws, records, test_records)
        _check_test_features(ws, records, test_records, dict_id)
    labels_name = labels or records
    out, y_all, lacking = _labelled_features(ws, records, dict_id, labels_name, on_bad_chunk)
    rows = labelled_rows(y_all, max_rows, seed, folds if split == "kfold" else None,
                         exclude=lacking, newest=split == "time")
    # ``parts``: the (records, rows) whose features are stacked, training records first.
    parts = [(records, rows)]
    y_rows = y_all[rows]
    if test_records is not None:
        test_out, y_test_all, test_lacking = _labelled_features(ws, test_records, dict_id,
                                                                test_records, on_bad_chunk)
        test_rows = np.setdiff1d(np.arange(y_test_all.shape[0]), test_lacking)
        parts.append((test_records, test_rows))
        y_rows = np.concatenate([y_rows, y_test_all[test_rows]])
    scored_records = test_records or records
    scored_labels = test_records or labels_name
    split_info = {"split": split, "test_records": test_records,
                  "test_share": float(options.test_share) if split == "time" else None}
    rows_fingerprint = fingerprint_params({"rows": [r.tolist() for _, r in parts],
                                           "y": y_rows.tolist(), **split_info})
    protocol = {"classifier": classifier, "C": C, "folds": folds, "seed": seed,
                "max_rows": max_rows, "n_boot": n_boot, **split_info}
    test_fingerprints = ({"records": ws.records_fingerprint(test_records),
                          "features": test_out.attrs["fingerprint"]} if test_records else None)
    key = evaluation_key(records=records, labels=labels_name, dict_id=dict_id,
                         records_fingerprint=ws.records_fingerprint(records),
                         features_fingerprint=out.attrs["fingerprint"], rows_fingerprint=rows_fingerprint,
                         protocol=protocol, baselines=baselines, learning_curve=learning_curve, tag=tag,
                         test_fingerprints=test_fingerprints)
    earlier = ws.find_evaluation(key)
    if earlier is not None:
        return _manifest(earlier, reused=True)
    classes, y = np.unique(y_rows, return_inverse=True)
    n_classes = classes.size
    if split == "kfold":
        fold_parts = stratified_folds(y, folds, seed)
    elif split == "time":
        fold_parts = time_split(y, options.test_share)
    else:
        fold_parts = holdout_split(rows.size, parts[1][1].size)
    scored = scored_positions(fold_parts)  # every row for k-fold; the test part otherwise
    fit = dict(classifier=classifier, C=C, seed=seed)

    predictions: dict[str, np.ndarray] = {}
    fold_scores: dict[str, list[float]] = {}
    curve_inputs: dict[str, np.ndarray] = {}
    sets = ("features",) + tuple(b for b in BASELINES if b in baselines)
    with threadpool_limits(limits=blas_threads):
        for name in sets:
            X = _feature_set(ws, name, dict_id, parts, seed)
            pred, fold_scores[name] = cross_predict(X, y, fold_parts, **fit)
            predictions[name] = pred[scored]
            if learning_curve:  # every set: the pictures show the best baseline beside raw
                curve_inputs[name] = curve_points(X, y, fold_parts, learning_curve, seed, fit)
            del X  # one feature set in memory at a time

    y_scored = y[scored]
    scored_rows = np.concatenate([r for _, r in parts])[scored]
    metrics, per_class = {}, {}
    arrays = {"rows": scored_rows}
    if split != "kfold":  # one training part; its positions index the training records' rows
        arrays["train_rows"] = rows[fold_parts[0][0]]
    for name, pred in predictions.items():
        conf = confusion(y_scored, pred, n_classes)
        metrics[name] = {k: float(v) for k, v in scores_from_confusion(conf).items()}
        metrics[name]["fold_accuracy"] = fold_scores[name]
        per_class[name] = class_report(y_scored, pred, classes)
        arrays[f"pred_{name}"] = classes[pred]
        arrays[f"confusion_{name}"] = conf
    # Paired over the scored rows: every set predicted the same rows.
    versus = {b: paired_bootstrap(y_scored, predictions["features"], predictions[b], n_classes,
                                  n_boot=n_boot, seed=seed)
              for b in sets[1:]}
    curve = curve_report(curve_inputs, metrics, fold_parts, learning_curve)

    fattrs = out.attrs
    cattrs = ws.output(codes_path(dict_id, records)).attrs
    attrs = {
        "records": records,
        "labels": labels_name,
        "scored_records": scored_records,
        "scored_labels": scored_labels,
        "dict_id": dict_id,
        "records_fingerprint": ws.records_fingerprint(records),
        "test_fingerprints": test_fingerprints,
        "dictionary_fingerprint": cattrs["dictionary_fingerprint"],
        "features_fingerprint": fattrs["fingerprint"],
        "rows_fingerprint": rows_fingerprint,
        "coder": fattrs["coder"],
        "coder_options": cattrs["params"]["coder_options"],
        "pooling": fattrs["params"],
        "protocol": protocol,
        "classes": classes.tolist(),
        "n_rows": int(scored.size),
        "n_train": int(arrays["train_rows"].size if split != "kfold" else rows.size),
        "rows_lacking": int(lacking.size),
        "tag": tag,
        "metrics": metrics,
        "per_class": per_class,
        "versus": versus,
        "learning_curve": curve,
    }
    run_id = ws.append_evaluation(attrs, arrays, key=key)
    return _manifest(ws.evaluation(run_id), reused=False)


def _check_test_features(ws: Workspace, records: str, test_records: str, dict_id: str) -> None:
    """Refuse test records whose features were made otherwise than the records' (another
    coder, coder options or pooling, so another width or meaning); silent while either is
    not pooled yet (the check of complete features names that)."""
    if not all(ws.has_output(features_path(dict_id, r)) for r in (records, test_records)):
        return
    train_out, test_out = (ws.output(features_path(dict_id, r)) for r in (records, test_records))
    same = {"coder": (ws.output(codes_path(dict_id, r)).attrs["params"] for r in (records, test_records)),
            "pooling": (o.attrs["params"] for o in (train_out, test_out))}
    for what, (a, b) in same.items():
        if a != b:
            raise InputError(problem(f"features of test records {test_records!r}",
                                     f"the training records' {what} {a}", str(b),
                                     "Encode and pool the test records with the same options "
                                     "(overwrite=True)."))
    width = (train_out.group["values"].shape[1], test_out.group["values"].shape[1])
    if width[0] != width[1]:
        raise InputError(problem(f"features of test records {test_records!r}",
                                 f"{width[0]} features per row", str(width[1]),
                                 "Pool the test records with the same options."))


def coding_of(ws: Workspace, records: str, dict_id: str) -> tuple[EncodeOptions, PoolOptions]:
    """The encode and pool options that made ``features/<dict_id>/<records>``, so other
    records (a test set) are coded and pooled the same way.

    Parameters
    ----------
    ws : Workspace
    records, dict_id : str
        The codes and features of these records must exist.

    Returns
    -------
    (EncodeOptions, PoolOptions)
    """
    coded = ws.output(codes_path(dict_id, records)).attrs["params"]
    pooled = ws.output(features_path(dict_id, records)).attrs["params"]
    return (EncodeOptions(coder=coded["coder"], coder_options=dict(coded["coder_options"])),
            PoolOptions(reduce=pooled["reduce"], split_sign=pooled["split_sign"],
                        regions=pooled["regions"]))


def _labelled_features(ws: Workspace, records: str, dict_id: str, labels_name: str,
                       on_bad_chunk: str):
    """The complete features output of ``records``, its labels, and the rows lacking features."""
    out = ws.output(features_path(dict_id, records))
    if not out.complete:
        raise InputError(problem(features_path(dict_id, records), "complete features",
                                 f"{int((~out.done_flags()).sum())} chunk(s) not pooled",
                                 "Run the encode and pool flows first."))
    y_all = ws.labels(labels_name)
    n_records = out.group["values"].shape[0]
    if y_all.shape[0] != n_records:
        raise InputError(problem(f"labels {labels_name!r}", f"{n_records} labels (one per record)",
                                 str(y_all.shape[0]), "Add labels for these records (overwrite=True)."))
    lacking = _skipped_rows(out, n_records)
    if on_bad_chunk == "skip":  # leave out the rows of features chunks that do not decode
        lacking = np.union1d(lacking, _unreadable_rows(out))
    return out, y_all, lacking


def evaluation_key(*, records: str, labels: str, dict_id: str, records_fingerprint: str,
                   features_fingerprint: str, rows_fingerprint: str, protocol: dict,
                   baselines, learning_curve, tag: str,
                   test_fingerprints: dict | None = None) -> str:
    """What an evaluation measures, as a digest: equal keys give equal evaluations.

    The features' fingerprint covers the dictionary, the coder and the pooling; the rows'
    fingerprint covers the labels, ``max_rows``, the seed and rows lacking features;
    ``protocol`` holds the classifier options, folds, seed, bootstrap size and the split
    (``split``, ``test_records``, ``test_share``); ``test_fingerprints`` the test records'
    and their features' fingerprints with split ``test-set`` (else None). The
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
        "learning_curve": [float(s) for s in learning_curve], "tag": tag,
        "test_fingerprints": test_fingerprints})


def _manifest(attrs: dict, *, reused: bool) -> dict:
    """The stage's manifest from a stored evaluation's attributes (new or found again)."""
    manifest = {"run_id": attrs["run_id"], "dict_id": attrs["dict_id"], "n_rows": attrs["n_rows"],
                "rows_lacking": attrs["rows_lacking"], "folds": attrs["protocol"]["folds"],
                "split": attrs["protocol"].get("split", "kfold"),
                "test_records": attrs["protocol"].get("test_records"),
                "n_train": attrs.get("n_train", attrs["n_rows"]),
                "coder": attrs["coder"], "pooling": attrs["pooling"], "tag": attrs["tag"],
                "versus": attrs["versus"], "learning_curve": attrs["learning_curve"], "reused": reused}
    manifest.update(attrs["metrics"])
    return manifest


# ---------------------------------------------------------------------------- helpers
def _skipped_rows(out, n_records: int) -> np.ndarray:
    """Rows whose features are missing because their input chunk was skipped."""
    rows_per_chunk = out.group["values"].chunks[0]
    parts = [np.arange(c * rows_per_chunk, min(n_records, (c + 1) * rows_per_chunk))
             for c in out.skipped_chunks()]
    return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)


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


def _records_reader(ws: Workspace, records: str, arr):
    """``read(c)`` of the records' row chunks, naming a chunk that does not decode."""
    return lambda c: ws.read_chunk(records, c, arr)


def _feature_set(ws: Workspace, name: str, dict_id: str, parts: list[tuple[str, np.ndarray]],
                 seed: int) -> np.ndarray:
    """ndarray of shape (sum of len(rows), F_name), float32: one feature set of the rows of
    each ``(records, rows)`` part, stacked in order; a dictionary baseline is built from the
    first part's (the training records') patches only."""
    if name == "features":
        return np.concatenate([_pooled_rows(ws, dict_id, records, rows) for records, rows in parts])
    if name == "raw":
        blocks = []
        for records, rows in parts:
            arr = ws.records(records)
            raw = take_rows(rows, arr.chunks[0], _records_reader(ws, records, arr))
            blocks.append(raw.reshape(rows.size, -1).astype(np.float32))
        return np.concatenate(blocks)
    chain = _dictionary_baseline(ws, name, dict_id, *parts[0], seed)
    blocks = []
    for records, rows in parts:
        arr = ws.records(records)
        # Chunk by chunk, coded in the records' dtype as the encode stage codes them.
        blocks.extend(chain.features(block)
                      for block in row_blocks(rows, arr.chunks[0], _records_reader(ws, records, arr)))
    return np.concatenate(blocks)


def _pooled_rows(ws: Workspace, dict_id: str, records: str, rows: np.ndarray) -> np.ndarray:
    """ndarray of shape (len(rows), F), float32: the stored pooled features of the rows."""
    out = ws.output(features_path(dict_id, records))
    values = out.group["values"]
    n, chunk_rows = values.shape[0], values.chunks[0]
    return take_rows(rows, chunk_rows, lambda c: out.read(
        "values", slice(c * chunk_rows, min(n, (c + 1) * chunk_rows))))


def _dictionary_baseline(ws: Workspace, kind: str, dict_id: str, records: str, rows: np.ndarray,
                         seed: int) -> FeatureChain:
    """The records→features chain of a random-patch or PCA dictionary built from a sample of
    the rows' patches, coding and pooling like the real features."""
    arr = ws.records(records)
    stored = ws.load_dictionary(dict_id)
    cattrs = ws.output(codes_path(dict_id, records)).attrs
    pooling = ws.output(features_path(dict_id, records)).attrs["params"]
    geometry, normaliser = stored.geometry(), stored.normaliser()
    read = _records_reader(ws, records, arr)
    patches = normaliser.apply(sample_patches(rows, geometry, _BASELINE_SAMPLE, seed,
                                              chunk_rows=arr.chunks[0], read=read))
    atoms = baseline_atoms(kind, patches, stored.atoms.shape[0], seed)
    options = dict(cattrs["params"]["coder_options"])
    if "n_nonzero" in options:
        options["n_nonzero"] = min(options["n_nonzero"], atoms.shape[0])
    return FeatureChain(geometry, atoms, cattrs["params"]["coder"], options, normaliser,
                        regions=pooling["regions"], reduce=pooling["reduce"],
                        split_sign=pooling["split_sign"])


#: The evaluate stage as a Prefect task.
evaluate_task = task(evaluate_features, name="evaluate-features", cache_policy=NO_CACHE)
