"""The evaluation's classifier and cross-validation, over in-memory feature arrays.

* :func:`make_classifier` — standardisation fitted on the training part, then a linear
  scikit-learn model: ``"logistic"`` (``LogisticRegression``) or ``"linear-svm"``
  (``LinearSVC``), both L2-regularised with strength ``1/C``;
* :func:`labelled_rows` — the rows to evaluate: all but those excluded, or a stratified
  seeded sample of ``max_rows``;
* :func:`stratified_folds` — shuffled, seeded stratified folds;
* :func:`holdout_split` / :func:`time_split` — one training part and one scored part: a
  named test set after the training rows, or the newest share of rows in row order;
* :func:`scored_positions` — the rows a split scores (every row for k-fold);
* :func:`cross_predict` — out-of-fold predictions (every row predicted once, by the model
  that did not see it);
* :func:`class_report` — precision, recall, F1 and support per class;
* :func:`curve_points` / :func:`curve_report` — accuracy against the number of
  labelled training rows, each fold's training part cut (stratified, seeded) to a share.

scikit-learn and numpy only; no I/O.
"""

from __future__ import annotations

import numpy as np
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import precision_recall_fscore_support
from sklearn.model_selection import StratifiedKFold, train_test_split
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import LinearSVC

from ..errors import InputError, problem

__all__ = ["CLASSIFIERS", "make_classifier", "check_folds", "check_training_classes",
           "labelled_rows", "stratified_folds", "holdout_split", "time_split", "scored_positions",
           "cross_predict", "class_report", "curve_points", "curve_report"]

CLASSIFIERS = ("logistic", "linear-svm")

#: Folds as (training positions, test positions) pairs into the evaluated rows.
Folds = list[tuple[np.ndarray, np.ndarray]]


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


def check_folds(y: np.ndarray, folds: int) -> None:
    """Stratified cross-validation needs 2+ folds and 2+ classes with ``folds`` rows each.

    Parameters
    ----------
    y : ndarray of shape (n,)
        Labels of the rows to evaluate.
    folds : int
    """
    if folds < 2:
        raise InputError(problem("folds", "at least 2", str(folds), "Use e.g. 5 folds."))
    classes, counts = np.unique(y, return_counts=True)
    if classes.size < 2 or counts.min() < folds:
        raise InputError(problem("labels", f"at least two classes with {folds} rows each",
                                 f"class counts {dict(zip(classes.tolist(), counts.tolist()))}",
                                 "Label more records or use fewer folds."))


def check_training_classes(y_train: np.ndarray, where: str = "labels") -> None:
    """A classifier fitted on one part of the rows needs two or more classes in that part.

    Parameters
    ----------
    y_train : ndarray of shape (n,)
        Labels of the training rows.
    where : str
        What the rows are, for the message.
    """
    classes = np.unique(y_train)
    if classes.size < 2:
        raise InputError(problem(where, "at least two classes among the training rows",
                                 f"classes {classes.tolist()} in {y_train.shape[0]} row(s)",
                                 "Label more records, or score a smaller share of them."))


def labelled_rows(y: np.ndarray, max_rows: int, seed: int, folds: int | None,
                  exclude: np.ndarray | None = None, *, newest: bool = False) -> np.ndarray:
    """The rows to evaluate: all rows but ``exclude``, or a stratified seeded subsample.

    Parameters
    ----------
    y : ndarray of shape (n,)
        Labels of every record.
    max_rows : int
        At most this many rows (``train_test_split`` stratified on ``y``, seeded).
    seed : int
    folds : int or None
        Checked against the class counts of the rows kept (:func:`check_folds`); ``None``
        (a split without folds) only asks for two classes.
    exclude : ndarray of int, optional
        Rows left out (e.g. those without features).
    newest : bool
        Keep the last ``max_rows`` rows instead of a sample (row order is time: a sample
        would mix old rows into the newest ones).

    Returns
    -------
    ndarray of shape (m,), int64
        Sorted row numbers.
    """
    keep = np.ones(y.shape[0], dtype=bool)
    if exclude is not None:
        keep[exclude] = False
    if folds is None:
        check_training_classes(y[keep])
    else:
        check_folds(y[keep], folds)
    rows = np.flatnonzero(keep)
    if rows.size > max_rows and newest:
        rows = rows[-max_rows:]
    elif rows.size > max_rows:
        rows, _ = train_test_split(rows, train_size=max_rows, stratify=y[rows], random_state=seed)
    return np.sort(rows)


def stratified_folds(y: np.ndarray, folds: int, seed: int) -> Folds:
    """Shuffled stratified folds (scikit-learn's ``StratifiedKFold``, seeded).

    Parameters
    ----------
    y : ndarray of shape (n,)
    folds : int
    seed : int

    Returns
    -------
    list of (ndarray, ndarray)
        Training and test positions into ``y``; the test parts cover every row once.
    """
    splitter = StratifiedKFold(n_splits=folds, shuffle=True, random_state=seed)
    return list(splitter.split(np.zeros(y.shape[0]), y))


def holdout_split(n_train: int, n_test: int) -> Folds:
    """One fold: the first ``n_train`` positions train, the next ``n_test`` are scored.

    Parameters
    ----------
    n_train, n_test : int
        Rows of the training records and of the test records, stacked in this order.

    Returns
    -------
    list of one (ndarray, ndarray), int64
    """
    return [(np.arange(n_train), np.arange(n_train, n_train + n_test))]


def time_split(y: np.ndarray, share: float) -> Folds:
    """One fold in row order: the older rows train, the newest ``ceil(share · n)`` are scored.

    Parameters
    ----------
    y : ndarray of shape (n,)
        Labels in row (time) order.
    share : float in (0, 1)

    Returns
    -------
    list of one (ndarray, ndarray), int64
    """
    n = y.shape[0]
    n_test = int(np.ceil(share * n))
    if n_test >= n:
        raise InputError(problem("test_share", f"a share leaving training rows among {n}",
                                 f"{share} scores all {n}", "Use a smaller --test-share."))
    check_training_classes(y[: n - n_test], "labels of the older rows")
    return [(np.arange(n - n_test), np.arange(n - n_test, n))]


def scored_positions(folds: Folds) -> np.ndarray:
    """The positions a split scores: its test parts, sorted (every row for k-fold).

    Parameters
    ----------
    folds : list of (train positions, test positions)

    Returns
    -------
    ndarray of shape (m,), int64
    """
    return np.sort(np.concatenate([test for _, test in folds])).astype(np.int64)


def cross_predict(
    X: np.ndarray, y: np.ndarray, folds: Folds, *,
    classifier: str = "logistic", C: float = 1.0, seed: int = 0,
) -> tuple[np.ndarray, list[float]]:
    """Out-of-fold predictions.

    Parameters
    ----------
    X : ndarray of shape (n, F)
    y : ndarray of shape (n,), int
    folds : list of (train positions, test positions)
        Positions into ``X``; no row is in two test parts.
    classifier, C, seed
        As :func:`make_classifier`.

    Returns
    -------
    pred : ndarray of shape (n,), int64
        -1 at rows no test part holds (the training rows of a held-out split).
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


def class_report(y: np.ndarray, pred: np.ndarray, classes: np.ndarray) -> dict:
    """Precision, recall, F1 and support per class.

    Parameters
    ----------
    y, pred : ndarray of shape (n,), int
        True and predicted class numbers (positions into ``classes``).
    classes : ndarray of shape (c,)
        The class labels.

    Returns
    -------
    dict
        ``{str(label): {"precision", "recall", "f1", "support"}}``.
    """
    p, r, f, s = precision_recall_fscore_support(y, pred, labels=np.arange(classes.size),
                                                 zero_division=0)
    return {str(c): {"precision": float(p[i]), "recall": float(r[i]), "f1": float(f[i]),
                     "support": int(s[i])} for i, c in enumerate(classes.tolist())}


def curve_points(X: np.ndarray, y: np.ndarray, folds: Folds, shares, seed: int,
                   fit: dict) -> np.ndarray:
    """Accuracy with each fold's training part cut to a share of its rows.

    Parameters
    ----------
    X : ndarray of shape (n, F)
    y : ndarray of shape (n,), int
    folds : list of (train positions, test positions)
    shares : sequence of float in (0, 1)
    seed : int
        Seeds the stratified cut.
    fit : dict
        Keyword arguments of :func:`make_classifier`.

    Returns
    -------
    ndarray of shape (len(shares), 2), float64
        Mean training rows and mean accuracy over the folds, per share.
    """
    out = np.zeros((len(shares), 2))
    n_classes = np.unique(y).size
    for i, share in enumerate(shares):
        sizes, scores = [], []
        for train, test in folds:
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


def curve_report(inputs: dict[str, np.ndarray], metrics: dict, folds: Folds, shares) -> dict:
    """Plain-JSON learning curve: shares, training rows, accuracy per set (full share last).

    Parameters
    ----------
    inputs : dict of str to ndarray of shape (len(shares), 2)
        :func:`curve_points` per feature set; must hold ``"features"`` unless empty.
    metrics : dict
        Per set, ``fold_accuracy`` of the full training parts.
    folds : list of (train positions, test positions)
    shares : sequence of float

    Returns
    -------
    dict
        ``{}`` without inputs, else ``shares``, ``train_rows`` and one accuracy list per set.
    """
    if not inputs:
        return {}
    full_rows = float(np.mean([train.size for train, _ in folds]))
    report = {"shares": [float(s) for s in shares] + [1.0],
              "train_rows": [float(v) for v in inputs["features"][:, 0]] + [full_rows]}
    for name, values in inputs.items():
        report[name] = [float(v) for v in values[:, 1]] + [float(np.mean(metrics[name]["fold_accuracy"]))]
    return report
