"""The evaluate stage's splits: a named test set and a time-ordered split, on the digits."""

from __future__ import annotations

import uuid

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

from atomline.stages import checks, encode, evaluate, gate, pool, train
from atomline.stages.errors import InputError
from atomline.stages.kernels.classify import time_split
from atomline.stages.options import EvaluateOptions, PoolOptions, TrainOptions, deciding
from atomline.stages.workspace import Workspace
from conftest import DIGITS_TRAIN

#: A fixed split of ours of scikit-learn's digits: the first 1,000 rows train, the rest test.
N_TRAIN = 1000
QUICK = dict(learning_curve=(), n_boot=300)


def _encode_and_pool(ws: Workspace, records: str, dict_id: str) -> None:
    encode.encode_chunks(ws, records, dict_id, encode.prepare_encode(ws, records, dict_id)["pending"])
    pool.pool_chunks(ws, records, dict_id,
                     pool.prepare_pool(ws, records, dict_id, options=PoolOptions(regions=2))["pending"])


@pytest.fixture(scope="module")
def held_out():
    """scikit-learn's bundled digits (an open data set, 1797 images of 8×8) split in two
    record sets; the dictionary is trained on the training rows only."""
    digits = load_digits()
    images, target = digits.images.astype(np.float32), digits.target
    ws = Workspace.open(f"memory://heldout-{uuid.uuid4().hex}", create=True)
    ws.add_records("digits_train", images[:N_TRAIN], chunk_rows=300)
    ws.add_labels("digits_train", target[:N_TRAIN])
    ws.add_records("digits_test", images[N_TRAIN:], chunk_rows=300)
    ws.add_labels("digits_test", target[N_TRAIN:])
    dict_id = train.train_dictionary(ws, "digits_train", TrainOptions(**DIGITS_TRAIN))["dict_id"]
    for records in ("digits_train", "digits_test"):
        _encode_and_pool(ws, records, dict_id)
    return ws, dict_id


def _reference_predictions(X: np.ndarray, y: np.ndarray, X_test: np.ndarray) -> np.ndarray:
    # Reference: a scikit-learn pipeline built by hand (standardisation, then
    # LogisticRegression with C=1), fitted on the training rows and predicting the test rows.
    model = make_pipeline(StandardScaler(), LogisticRegression(C=1.0, max_iter=2000, random_state=0))
    with threadpool_limits(1):  # one BLAS thread, as the stage fits it
        return model.fit(X, y).predict(X_test)


def test_test_set_score_equals_scikit_learn_fitted_by_hand(held_out):
    ws, dict_id = held_out
    ev = evaluate.evaluate_features(
        ws, "digits_train", dict_id,
        EvaluateOptions(split="test-set", test_records="digits_test", baselines=("raw",), **QUICK))
    y_train, y_test = ws.labels("digits_train"), ws.labels("digits_test")
    features = {r: ws.output(f"features/{dict_id}/{r}").group["values"][:]
                for r in ("digits_train", "digits_test")}
    ref = _reference_predictions(features["digits_train"], y_train, features["digits_test"])
    arrays = ws.evaluation_arrays(ev["run_id"])
    np.testing.assert_array_equal(arrays["rows"], np.arange(y_test.size))
    np.testing.assert_array_equal(arrays["train_rows"], np.arange(N_TRAIN))
    np.testing.assert_array_equal(arrays["pred_features"], ref)
    assert ev["features"]["accuracy"] == pytest.approx(np.mean(ref == y_test), abs=1e-12)
    assert ev["n_rows"] == y_test.size and ev["n_train"] == N_TRAIN
    # The raw baseline: the same hand-made pipeline on the flattened pixels.
    images = load_digits().images.reshape(-1, 64).astype(np.float32)
    raw_ref = _reference_predictions(images[:N_TRAIN], y_train, images[N_TRAIN:])
    np.testing.assert_array_equal(arrays["pred_raw"], raw_ref)
    assert ev["raw"]["accuracy"] == pytest.approx(np.mean(raw_ref == y_test), abs=1e-12)
    # The paired bootstrap runs over the scored rows: its difference is the test accuracies'.
    assert ev["versus"]["raw"]["accuracy"]["difference"] == pytest.approx(
        np.mean(ref == y_test) - np.mean(raw_ref == y_test), abs=1e-12)
    assert arrays["confusion_features"].sum() == y_test.size
    stored = next(e for e in ws.evaluations() if e["run_id"] == ev["run_id"])
    assert stored["protocol"]["split"] == "test-set"
    assert stored["protocol"]["test_records"] == "digits_test"
    assert stored["scored_records"] == stored["scored_labels"] == "digits_test"
    assert stored["test_fingerprints"]["records"] == ws.records_fingerprint("digits_test")
    # A k-fold evaluation of the same records is another evaluation (another key and rows),
    # and the gate's comparison refuses to pair it with the held-out one.
    kfold = evaluate.evaluate_features(ws, "digits_train", dict_id,
                                       EvaluateOptions(baselines=(), **QUICK))
    assert kfold["run_id"] != ev["run_id"] and kfold["split"] == "kfold"
    with pytest.raises(InputError, match="same rows"):
        gate.compare_evaluations(ws, ev["run_id"], kfold["run_id"])
    again = evaluate.evaluate_features(
        ws, "digits_train", dict_id,
        EvaluateOptions(split="test-set", test_records="digits_test", baselines=("raw",), **QUICK))
    assert again["reused"] and again["run_id"] == ev["run_id"]


def test_compare_evaluations_of_held_out_scores_uses_the_test_labels(held_out):
    ws, dict_id = held_out
    opts = dict(split="test-set", test_records="digits_test", baselines=(), **QUICK)
    a = evaluate.evaluate_features(ws, "digits_train", dict_id, EvaluateOptions(C=1.0, **opts))
    b = evaluate.evaluate_features(ws, "digits_train", dict_id, EvaluateOptions(C=0.01, **opts))
    cmp = gate.compare_evaluations(ws, a["run_id"], b["run_id"], n_boot=300)
    assert cmp["accuracy"]["difference"] == pytest.approx(
        a["features"]["accuracy"] - b["features"]["accuracy"], abs=1e-12)


def test_test_records_coded_like_the_records_give_the_same_features(held_out):
    # What the flows do for a test set: encode and pool it with the options that made the
    # training records' features.
    ws, dict_id = held_out
    if not ws.has_labels("digits_test_again"):
        ws.add_records("digits_test_again", ws.records("digits_test")[:], chunk_rows=250)
        ws.add_labels("digits_test_again", ws.labels("digits_test"))
        enc, pooling = evaluate.coding_of(ws, "digits_train", dict_id)
        assert pooling.regions == 2 and enc.coder == "omp"
        encode.encode_chunks(ws, "digits_test_again", dict_id, encode.prepare_encode(
            ws, "digits_test_again", dict_id, enc)["pending"], enc)
        pool.pool_chunks(ws, "digits_test_again", dict_id, pool.prepare_pool(
            ws, "digits_test_again", dict_id, pooling)["pending"], pooling)
    checks.check_test_records(ws, "digits_train", "digits_test_again")  # accepted
    evaluate._check_test_features(ws, "digits_train", "digits_test_again", dict_id)
    np.testing.assert_array_equal(ws.output(f"features/{dict_id}/digits_test_again").group["values"][:],
                                  ws.output(f"features/{dict_id}/digits_test").group["values"][:])


def test_test_set_of_another_shape_is_refused(held_out):
    ws, dict_id = held_out
    ws.add_records("small", np.zeros((40, 4, 4), np.float32), chunk_rows=40)
    ws.add_labels("small", np.arange(40) % 4)
    with pytest.raises(InputError, match=r"test records 'small'.*\(8, 8\).*\(4, 4\)"):
        evaluate.evaluate_features(ws, "digits_train", dict_id,
                                   EvaluateOptions(split="test-set", test_records="small"))
    with pytest.raises(InputError, match="records other than"):
        checks.check_test_records(ws, "digits_train", "digits_train")


def test_test_set_pooled_otherwise_is_refused():
    digits = load_digits()
    ws = Workspace.open(f"memory://heldout-pool-{uuid.uuid4().hex}", create=True)
    for name, part in (("a", slice(0, 400)), ("b", slice(400, 600))):
        ws.add_records(name, digits.images[part].astype(np.float32), chunk_rows=200)
        ws.add_labels(name, digits.target[part])
    dict_id = train.train_dictionary(ws, "a", TrainOptions(n_atoms=16, patch_size=4, stride=2,
                                                          sample_patches=2000))["dict_id"]
    for name, regions in (("a", 2), ("b", 1)):
        encode.encode_chunks(ws, name, dict_id, encode.prepare_encode(ws, name, dict_id)["pending"])
        pool.pool_chunks(ws, name, dict_id, pool.prepare_pool(
            ws, name, dict_id, options=PoolOptions(regions=regions))["pending"])
    with pytest.raises(InputError, match="training records' pooling"):
        evaluate.evaluate_features(ws, "a", dict_id, EvaluateOptions(split="test-set", test_records="b"))


def test_time_split_scores_exactly_the_newest_share():
    y = np.arange(103) % 3
    ((train_part, test_part),) = time_split(y, 0.2)
    np.testing.assert_array_equal(test_part, np.arange(103 - 21, 103))  # ceil(0.2 · 103) = 21
    np.testing.assert_array_equal(train_part, np.arange(103 - 21))
    with pytest.raises(InputError, match="two classes"):
        time_split(np.r_[np.zeros(10, int), np.arange(5)], 0.34)  # the older rows: class 0 only


def test_time_split_sees_label_drift_that_k_fold_dilutes(digits_workspace):
    # scikit-learn's digits in their given order; a drift planted in the newest 5% of the
    # rows: their labels move to the next digit (a relabelled class meaning). The records
    # are the same images, encoded and pooled again under another name for these labels.
    ws, dict_id = digits_workspace
    y = ws.labels("digits")
    n_new = int(np.ceil(0.05 * y.size))
    drifted = y.copy()
    drifted[-n_new:] = (y[-n_new:] + 1) % 10
    if not ws.has_labels("digits_drift"):
        ws.add_records("digits_drift", ws.records("digits")[:], chunk_rows=300)
        ws.add_labels("digits_drift", drifted)
        _encode_and_pool(ws, "digits_drift", dict_id)
    scores = {}
    for records in ("digits", "digits_drift"):
        for split in ("kfold", "time"):
            ev = evaluate.evaluate_features(ws, records, dict_id, EvaluateOptions(
                split=split, test_share=0.05, baselines=("raw",), **QUICK))
            scores[records, split] = ev["features"]["accuracy"]
            if split == "time":
                rows = ws.evaluation_arrays(ev["run_id"])["rows"]
                np.testing.assert_array_equal(rows, np.arange(y.size - n_new, y.size))
                assert ev["n_rows"] == n_new and ev["n_train"] == y.size - n_new
                # The bootstrap interval is over the scored rows only.
                assert ws.evaluation_arrays(ev["run_id"])["confusion_raw"].sum() == n_new
    print(scores)
    # Undrifted, both splits score the digits well.
    assert scores["digits", "kfold"] > 0.93 and scores["digits", "time"] > 0.85
    # The time split scores only the drifted rows, which the older rows never taught:
    # its accuracy collapses.
    assert scores["digits_drift", "time"] < 0.15
    # k-fold mixes the drifted rows into every fold: they cost it about their share (5%),
    # so it still looks healthy.
    assert scores["digits", "kfold"] - scores["digits_drift", "kfold"] < 0.08
    assert scores["digits_drift", "kfold"] > 0.85


def test_split_options_are_checked():
    with pytest.raises(InputError, match="test_records"):
        EvaluateOptions(split="test-set")
    with pytest.raises(InputError, match="test_records"):
        EvaluateOptions(test_records="digits_test")  # k-fold names no test set
    with pytest.raises(InputError, match="split"):
        EvaluateOptions(split="random")
    with pytest.raises(InputError, match="test_share"):
        EvaluateOptions(split="time", test_share=1.0)
    assert EvaluateOptions().split == "kfold"  # today's protocol stays the default


def test_nightly_run_key_follows_the_test_records():
    ws = Workspace.open(f"memory://heldout-key-{uuid.uuid4().hex}", create=True)
    rng = np.random.default_rng(0)
    for name in ("a", "b"):
        ws.add_records(name, rng.standard_normal((20, 8)).astype(np.float32), chunk_rows=10)
        ws.add_labels(name, np.arange(20) % 2)
    held = {"labels": None, "evaluate": deciding(EvaluateOptions(split="test-set", test_records="b"))}
    kfold = {"labels": None, "evaluate": deciding(EvaluateOptions())}
    keys = (gate.nightly_run_key(ws, "a", held), gate.nightly_run_key(ws, "a", kfold))
    ws.add_labels("b", (np.arange(20) + 1) % 2, overwrite=True)
    # New test labels are a new decision; a k-fold run never reads them.
    assert gate.nightly_run_key(ws, "a", held) != keys[0]
    assert gate.nightly_run_key(ws, "a", kfold) == keys[1]
