"""The evaluate stage: does a linear classifier do better on the sparse features?

Protocol: the labelled records are split once, stratified and seeded, into a training and
a test part; a scikit-learn logistic regression is fitted on standardised features and
scored on the test part (accuracy and macro-F1). The same classifier on the raw records,
flattened, is the baseline. The split depends only on the labels and the seed, so two
dictionaries evaluated with the same seed are compared on the same test rows.

Each evaluation is appended to ``evaluations/<run-id>`` and never rewritten.

``evaluate_task`` is :func:`evaluate_features` as a Prefect task.
"""

from __future__ import annotations

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import accuracy_score, confusion_matrix, f1_score
from sklearn.model_selection import train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from .errors import InputError, problem
from .pool import features_path
from .workspace import Workspace, iter_row_chunks

__all__ = ["evaluate_features", "evaluate_task", "score_linear"]


def score_linear(
    X_train: np.ndarray, y_train: np.ndarray, X_test: np.ndarray, y_test: np.ndarray,
    *, C: float = 1.0, seed: int = 0,
) -> dict:
    """Fit a standardised logistic regression and score it.

    Parameters
    ----------
    X_train : ndarray of shape (n_train, F)
    y_train : ndarray of shape (n_train,)
    X_test : ndarray of shape (n_test, F)
    y_test : ndarray of shape (n_test,)
    C : float
        Inverse L2 regularisation strength.
    seed : int

    Returns
    -------
    dict
        ``accuracy``, ``macro_f1`` (floats) and ``confusion`` (ndarray of shape (c, c),
        rows true class, columns predicted, classes in sorted order).
    """
    model = make_pipeline(StandardScaler(), LogisticRegression(C=C, max_iter=2000,
                                                               random_state=seed))
    model.fit(X_train, y_train)
    pred = model.predict(X_test)
    classes = np.unique(np.concatenate([y_train, y_test]))
    return {
        "accuracy": float(accuracy_score(y_test, pred)),
        "macro_f1": float(f1_score(y_test, pred, average="macro")),
        "confusion": confusion_matrix(y_test, pred, labels=classes),
    }


def evaluate_features(
    workspace: Workspace | str,
    records: str,
    dict_id: str,
    *,
    labels: str | None = None,
    test_fraction: float = 0.25,
    max_rows: int = 20_000,
    C: float = 1.0,
    seed: int = 0,
    baseline: bool = True,
    tag: str = "",
) -> dict:
    """Evaluate pooled features against the raw-record baseline and record the result.

    Parameters
    ----------
    workspace : Workspace or str
    records : str
    dict_id : str
        Features ``features/<dict_id>/<records>`` must be complete.
    labels : str, optional
        Name of the labels array; defaults to ``records``.
    test_fraction : float
        Share of labelled rows held out for scoring.
    max_rows : int
        At most this many labelled rows (a stratified seeded subsample), so the
        classifier's memory stays bounded on a large archive.
    C : float
    seed : int
        Seeds the split and the subsample.
    baseline : bool
        Also score the raw records.
    tag : str
        Free text stored with the evaluation (e.g. ``"candidate"``).

    Returns
    -------
    dict
        ``run_id``, ``dict_id``, ``features`` and ``raw`` metric dicts (accuracy,
        macro_f1), ``n_train``, ``n_test``, ``coder``, ``pooling``.
    """
    ws = workspace if isinstance(workspace, Workspace) else Workspace.open(workspace)
    out = ws.output(features_path(dict_id, records))
    if not out.complete:
        raise InputError(problem(features_path(dict_id, records), "complete features",
                                 f"{int((~out.done_flags()).sum())} chunk(s) not pooled",
                                 "Run the encode and pool flows first."))
    y = ws.labels(labels or records)
    n_records = out.group["values"].shape[0]
    if y.shape[0] != n_records:
        raise InputError(problem(f"labels {labels or records!r}", f"{n_records} labels (one per record)",
                                 str(y.shape[0]), "Add labels for these records (overwrite=True)."))
    lacking = _skipped_rows(out, n_records)
    rows = _labelled_rows(y, max_rows, seed, exclude=lacking)
    train_i, test_i = train_test_split(rows, test_size=test_fraction, stratify=y[rows],
                                       random_state=seed)
    train_i, test_i = np.sort(train_i), np.sort(test_i)
    features = _take_rows(out.group["values"], rows)
    tr, te = np.searchsorted(rows, train_i), np.searchsorted(rows, test_i)
    result = {"features": score_linear(features[tr], y[train_i], features[te], y[test_i],
                                       C=C, seed=seed)}
    if baseline:
        raw = _take_rows(ws.records(records), rows).reshape(len(rows), -1)
        result["raw"] = score_linear(raw[tr], y[train_i], raw[te], y[test_i], C=C, seed=seed)
    fattrs = out.attrs
    attrs = {
        "records": records,
        "dict_id": dict_id,
        "features_fingerprint": fattrs["fingerprint"],
        "coder": fattrs["coder"],
        "pooling": fattrs["params"],
        "protocol": {"classifier": "logistic-regression", "C": C,
                     "test_fraction": test_fraction, "seed": seed, "max_rows": max_rows},
        "n_train": int(len(train_i)),
        "n_test": int(len(test_i)),
        "rows_lacking": int(lacking.size),
        "tag": tag,
        "metrics": {k: {m: v[m] for m in ("accuracy", "macro_f1")} for k, v in result.items()},
    }
    run_id = ws.append_evaluation(attrs, {f"confusion_{k}": v["confusion"]
                                          for k, v in result.items()})
    manifest = {"run_id": run_id, "dict_id": dict_id, "n_train": attrs["n_train"],
                "n_test": attrs["n_test"], "coder": attrs["coder"], "pooling": attrs["pooling"],
                "rows_lacking": attrs["rows_lacking"]}
    manifest.update(attrs["metrics"])
    return manifest


def _skipped_rows(out, n_records: int) -> np.ndarray:
    """Rows whose features are missing because their input chunk was skipped."""
    rows_per_chunk = out.group["values"].chunks[0]
    parts = [np.arange(c * rows_per_chunk, min(n_records, (c + 1) * rows_per_chunk))
             for c in out.skipped_chunks()]
    return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)


def _labelled_rows(y: np.ndarray, max_rows: int, seed: int,
                   exclude: np.ndarray | None = None) -> np.ndarray:
    """Sorted row numbers to use: all rows but ``exclude``, or a stratified seeded subsample."""
    keep = np.ones(y.shape[0], dtype=bool)
    if exclude is not None:
        keep[exclude] = False
    classes, counts = np.unique(y[keep], return_counts=True)
    if classes.size < 2 or counts.min() < 2:
        raise InputError(problem("labels", "at least two classes with two rows each",
                                 f"class counts {dict(zip(classes.tolist(), counts.tolist()))}",
                                 "Label more records."))
    rows = np.flatnonzero(keep)
    if rows.size > max_rows:
        rows, _ = train_test_split(rows, train_size=max_rows, stratify=y[rows], random_state=seed)
    return np.sort(rows)


def _take_rows(arr, rows: np.ndarray) -> np.ndarray:
    """Read the given sorted rows chunk by chunk (never the whole array at once)."""
    parts = []
    for _, sl in iter_row_chunks(arr):
        inside = rows[(rows >= sl.start) & (rows < sl.stop)]
        if inside.size:
            parts.append(np.asarray(arr[sl])[inside - sl.start])
    return np.concatenate(parts)


#: The evaluate stage as a Prefect task.
evaluate_task = task(evaluate_features, name="evaluate-features", cache_policy=NO_CACHE)
