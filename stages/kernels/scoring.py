"""Classification scores from confusion matrices, and their paired bootstrap.

Pure numpy. Every score here is a function of a confusion matrix (rows: true class,
columns: predicted class), so a bootstrap resample only needs the resample's confusion
matrix: the rows of an evaluation are coded once as cells ``true * c + predicted`` and a
batch of resamples is counted with one ``bincount``.

Scores (``SCORES``):

``accuracy``
    trace / total.
``balanced_accuracy``
    mean over classes present in the truth of recall = diag / row sum.
``macro_f1``
    mean over classes present in the truth or the predictions of
    ``2 tp / (2 tp + fp + fn)``.

These follow scikit-learn's definitions (``accuracy_score``,
``balanced_accuracy_score``, ``f1_score(average="macro")``) and are checked against them
in the tests.

The paired bootstrap (Efron & Tibshirani, *An Introduction to the Bootstrap*, 1993,
ch. 13, percentile interval) resamples the *rows* of one evaluation with replacement and
recomputes the score of two prediction vectors on the same resample, so the interval of
their difference accounts for both being measured on the same rows.

Example
-------
>>> import numpy as np
>>> y = np.array([0, 0, 1, 1, 2, 2]); a = np.array([0, 0, 1, 1, 2, 0])
>>> round(float(scores_from_confusion(confusion(y, a, 3))["accuracy"]), 4)
0.8333
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError, problem

__all__ = ["SCORES", "confusion", "scores_from_confusion", "paired_bootstrap"]

SCORES = ("accuracy", "balanced_accuracy", "macro_f1")


def confusion(y: np.ndarray, pred: np.ndarray, n_classes: int) -> np.ndarray:
    """Confusion matrix of class numbers.

    Parameters
    ----------
    y, pred : ndarray of shape (n,), int
        True and predicted class numbers in ``0 .. n_classes - 1``.
    n_classes : int

    Returns
    -------
    ndarray of shape (n_classes, n_classes), int64
        ``[i, j]`` counts rows of true class ``i`` predicted as ``j``.
    """
    cells = np.asarray(y, np.int64) * n_classes + np.asarray(pred, np.int64)
    return np.bincount(cells, minlength=n_classes * n_classes).reshape(n_classes, n_classes)


def scores_from_confusion(conf: np.ndarray) -> dict[str, np.ndarray]:
    """The scores of one or many confusion matrices.

    Parameters
    ----------
    conf : ndarray of shape (..., c, c)
        Counts, rows true class.

    Returns
    -------
    dict of str to ndarray of shape (...)
        One entry per name in :data:`SCORES`.
    """
    conf = np.asarray(conf, dtype=np.float64)
    diag = np.diagonal(conf, axis1=-2, axis2=-1)
    truth = conf.sum(axis=-1)
    predicted = conf.sum(axis=-2)
    total = truth.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        recall = np.where(truth > 0, diag / truth, np.nan)
        denom = truth + predicted
        f1 = np.where(denom > 0, 2 * diag / denom, np.nan)
        return {
            "accuracy": diag.sum(axis=-1) / total,
            "balanced_accuracy": _nanmean(recall),
            "macro_f1": _nanmean(f1),
        }


def _nanmean(a: np.ndarray) -> np.ndarray:
    """Mean over the last axis ignoring NaN (classes absent from a resample)."""
    present = ~np.isnan(a)
    return np.where(present, a, 0).sum(axis=-1) / np.maximum(present.sum(axis=-1), 1)


def paired_bootstrap(
    y: np.ndarray,
    pred_a: np.ndarray,
    pred_b: np.ndarray,
    n_classes: int,
    *,
    n_boot: int = 2000,
    level: float = 0.95,
    seed: int = 0,
    batch: int = 64,
) -> dict[str, dict[str, float]]:
    """Percentile bootstrap interval of ``score(a) - score(b)`` on the same rows.

    Parameters
    ----------
    y : ndarray of shape (n,), int
        True class numbers in ``0 .. n_classes - 1``.
    pred_a, pred_b : ndarray of shape (n,), int
        Two predictions of the same rows.
    n_classes : int
    n_boot : int
        Number of resamples.
    level : float
        Coverage of the interval.
    seed : int
        Seeds the resampling; the same seed gives the same interval.
    batch : int
        Resamples counted at once; bounds memory at about ``batch * n`` integers.

    Returns
    -------
    dict of str to dict
        Per score name: ``a``, ``b`` (scores on all rows), ``difference`` (a − b),
        ``low``, ``high`` (the interval of the difference), ``level``, ``n_boot``.
    """
    y, pred_a, pred_b = (np.asarray(v, np.int64) for v in (y, pred_a, pred_b))
    n = y.shape[0]
    if not (pred_a.shape == pred_b.shape == (n,)) or n == 0:
        raise InputError(problem("paired bootstrap", "three equal-length non-empty 1-D arrays",
                                 f"shapes {y.shape}, {pred_a.shape}, {pred_b.shape}",
                                 "Pass predictions of the same rows."))
    if not 0 < level < 1 or n_boot < 1:
        raise InputError(problem("paired bootstrap", "0 < level < 1 and n_boot ≥ 1",
                                 f"level {level}, n_boot {n_boot}", "Use e.g. 0.95 and 2000."))
    cc = n_classes * n_classes
    cells_a, cells_b = y * n_classes + pred_a, y * n_classes + pred_b
    rng = np.random.default_rng(seed)
    diffs = {name: np.empty(n_boot) for name in SCORES}
    for start in range(0, n_boot, batch):
        b = min(batch, n_boot - start)
        rows = rng.integers(0, n, size=(b, n))
        offset = (np.arange(b) * cc)[:, None]
        conf_a = np.bincount((cells_a[rows] + offset).ravel(), minlength=b * cc).reshape(b, n_classes, n_classes)
        conf_b = np.bincount((cells_b[rows] + offset).ravel(), minlength=b * cc).reshape(b, n_classes, n_classes)
        sa, sb = scores_from_confusion(conf_a), scores_from_confusion(conf_b)
        for name in SCORES:
            diffs[name][start : start + b] = sa[name] - sb[name]
    full_a = scores_from_confusion(confusion(y, pred_a, n_classes))
    full_b = scores_from_confusion(confusion(y, pred_b, n_classes))
    tail = 100 * (1 - level) / 2
    out = {}
    for name in SCORES:
        low, high = np.percentile(diffs[name], [tail, 100 - tail])
        out[name] = {"a": float(full_a[name]), "b": float(full_b[name]),
                     "difference": float(full_a[name] - full_b[name]),
                     "low": float(low), "high": float(high), "level": float(level),
                     "n_boot": int(n_boot)}
    return out
