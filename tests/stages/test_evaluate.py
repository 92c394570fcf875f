"""The evaluation protocol: scores, paired bootstrap, baselines, and the digits."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from sklearn.metrics import accuracy_score, balanced_accuracy_score, f1_score
from sklearn.model_selection import StratifiedKFold, cross_val_predict
from threadpoolctl import threadpool_limits

from atomline.stages import evaluate
from atomline.stages.errors import InputError
from atomline.stages.kernels.classify import make_classifier
from atomline.stages.kernels.scoring import confusion, paired_bootstrap, scores_from_confusion
from atomline.stages.options import EvaluateOptions


def test_scores_equal_scikit_learn_including_absent_classes():
    # Reference: scikit-learn's accuracy_score, balanced_accuracy_score, f1_score(macro).
    rng = np.random.default_rng(0)
    y = rng.integers(0, 5, 400)
    pred = np.where(rng.random(400) < 0.7, y, rng.integers(0, 5, 400))
    pred[pred == 3] = 2  # class 3 never predicted: its F1 is 0, as in scikit-learn
    y[y == 4] = 0        # class 4 never true but predicted: counted by macro-F1 only
    s = scores_from_confusion(confusion(y, pred, 5))
    assert s["accuracy"] == pytest.approx(accuracy_score(y, pred))
    with pytest.warns(UserWarning):  # scikit-learn warns about the predicted-only class
        ref_bal = balanced_accuracy_score(y, pred)
    assert s["balanced_accuracy"] == pytest.approx(ref_bal)
    assert s["macro_f1"] == pytest.approx(f1_score(y, pred, average="macro", zero_division=0))


def test_paired_bootstrap_interval_matches_scipy():
    # Reference: scipy.stats.bootstrap (paired, percentile) of the mean difference of
    # correctness, which is the accuracy difference. Monte Carlo: agree to ~0.006.
    rng = np.random.default_rng(1)
    y = rng.integers(0, 3, 1500)
    a = np.where(rng.random(1500) < 0.85, y, (y + 1) % 3)
    b = np.where(rng.random(1500) < 0.80, y, (y + 2) % 3)
    ours = paired_bootstrap(y, a, b, 3, n_boot=4000, seed=2)["accuracy"]
    ref = stats.bootstrap(((a == y).astype(float), (b == y).astype(float)),
                          lambda u, v: np.mean(u - v), paired=True, vectorized=False,
                          n_resamples=4000, method="percentile", random_state=3).confidence_interval
    assert ours["difference"] == pytest.approx(np.mean(a == y) - np.mean(b == y))
    assert ours["low"] == pytest.approx(ref.low, abs=0.006)
    assert ours["high"] == pytest.approx(ref.high, abs=0.006)
    # Published formula: the standard error of a difference of paired proportions is
    # sqrt((n10 + n01)/n² − (n10 − n01)²/n³) (Agresti, Categorical Data Analysis, §10.1);
    # the percentile interval is close to ±1.96 SE for n this large.
    n10 = np.sum((a == y) & (b != y)); n01 = np.sum((a != y) & (b == y)); n = y.size
    se = np.sqrt((n10 + n01) / n**2 - (n10 - n01) ** 2 / n**3)
    assert (ours["high"] - ours["low"]) / 2 == pytest.approx(1.96 * se, rel=0.1)


def test_paired_bootstrap_of_identical_predictions_is_zero():
    y = np.arange(90) % 3
    p = (y + (np.arange(90) % 7 == 0)) % 3
    out = paired_bootstrap(y, p, p, 3, n_boot=200)
    for score in out.values():
        assert score["difference"] == score["low"] == score["high"] == 0.0


@pytest.fixture(scope="module")
def digits_evaluation(digits_workspace):
    ws, dict_id = digits_workspace
    return evaluate.evaluate_features(ws, "digits", dict_id, tag="digits", options=EvaluateOptions(folds=5, learning_curve=(0.1,), n_boot=1000, seed=0))


def test_digits_sparse_features_not_worse_than_raw_pixels(digits_evaluation):
    # Open data set: scikit-learn's bundled handwritten digits (UCI optical digits test
    # set, 1797 images of 8×8). A standardised logistic regression on the raw pixels
    # scores about 0.96–0.97 in 5-fold cross-validation (a widely reported figure, from
    # memory); check ours lands there.
    ev = digits_evaluation
    print({k: round(ev[k]["accuracy"], 4) for k in ("features", "raw", "random_patches", "pca")},
          {k: {m: round(v["accuracy"][m], 4) for m in ("difference", "low", "high")}
           for k, v in ev["versus"].items()})
    assert 0.95 <= ev["raw"]["accuracy"] <= 0.98
    versus_raw = ev["versus"]["raw"]["accuracy"]
    assert versus_raw["difference"] == pytest.approx(ev["features"]["accuracy"] - ev["raw"]["accuracy"])
    assert versus_raw["low"] <= versus_raw["difference"] <= versus_raw["high"]
    # Not worse than raw beyond noise: the interval of features − raw reaches 0 or above.
    assert versus_raw["high"] >= 0.0
    assert ev["features"]["accuracy"] > 0.95


def test_raw_baseline_equals_scikit_learn_cross_val_predict(digits_workspace, digits_evaluation):
    # Reference: scikit-learn's cross_val_predict with the same folds and classifier.
    ws, _ = digits_workspace
    arrays = ws.evaluation_arrays(digits_evaluation["run_id"])
    X = ws.records("digits")[:].reshape(-1, 64)
    y = ws.labels("digits")
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    with threadpool_limits(1):  # small matrices: one BLAS thread, as the stage runs them
        ref = cross_val_predict(make_classifier("logistic", seed=0), X, y, cv=folds)
    np.testing.assert_array_equal(arrays["pred_raw"], ref)


def test_evaluation_record_names_what_it_measured(digits_workspace, digits_evaluation):
    ws, dict_id = digits_workspace
    ev = digits_evaluation
    stored = next(e for e in ws.evaluations() if e["run_id"] == ev["run_id"])
    assert stored["dict_id"] == dict_id
    assert stored["dictionary_fingerprint"] == ws.load_dictionary(dict_id).fingerprint
    assert stored["records_fingerprint"] == ws.records_fingerprint("digits")
    assert stored["coder"] == "omp" and stored["coder_options"] == {"n_nonzero": 3}
    assert stored["pooling"]["regions"] == 2
    assert stored["n_rows"] == 1797 and stored["classes"] == list(range(10))
    arrays = ws.evaluation_arrays(ev["run_id"])
    for name in ("features", "raw", "random_patches", "pca"):
        conf = arrays[f"confusion_{name}"]
        assert conf.sum() == 1797
        assert np.trace(conf) / 1797 == pytest.approx(ev[name]["accuracy"])
        per_class = stored["per_class"][name]
        assert sum(c["support"] for c in per_class.values()) == 1797
        # Per-class recall is the diagonal over the row sums of the confusion matrix.
        assert per_class["3"]["recall"] == pytest.approx(conf[3, 3] / conf[3].sum())
    curve = ev["learning_curve"]
    assert curve["shares"] == [0.1, 1.0]
    assert curve["train_rows"][0] == pytest.approx(0.1 * 1797 * 0.8, rel=0.02)
    assert curve["features"][0] < curve["features"][1]  # more labels help


def test_linear_svm_option_and_refusals(digits_workspace):
    ws, dict_id = digits_workspace
    ev = evaluate.evaluate_features(ws, "digits", dict_id, options=EvaluateOptions(classifier="linear-svm", baselines=("raw",), learning_curve=(), n_boot=200, max_rows=600))
    stored = next(e for e in ws.evaluations() if e["run_id"] == ev["run_id"])
    assert stored["protocol"]["classifier"] == "linear-svm"
    assert ev["features"]["accuracy"] > 0.85
    with pytest.raises(InputError, match="classifier"):
        evaluate.evaluate_features(ws, "digits", dict_id, options=EvaluateOptions(classifier="forest"))
    with pytest.raises(InputError, match="baselines"):
        evaluate.evaluate_features(ws, "digits", dict_id, options=EvaluateOptions(baselines=("raw", "wavelets")))
    with pytest.raises(InputError, match="rows each"):
        evaluate.evaluate_features(ws, "digits", dict_id, options=EvaluateOptions(folds=500))
