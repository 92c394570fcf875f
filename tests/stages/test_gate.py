"""The promotion gate (stages/gate.py): comparison, rule, decision record and promotion, no Prefect."""

from __future__ import annotations

import doctest
import uuid

import numpy as np
import pytest
from sklearn.metrics import accuracy_score, f1_score

from atomline.stages import encode, evaluate, gate, pool, train
from atomline.stages.errors import FingerprintMismatch, InputError, NotFound
from atomline.stages.options import EvaluateOptions, PoolOptions, TrainOptions
from atomline.stages.workspace import Workspace, fingerprint_params

N_ROWS = 64  # a power of two: every score difference below is exact in binary floating point


def _workspace(n_rows: int = N_ROWS, width: int = 32, seed: int = 0) -> Workspace:
    """Records (noise plus a class-dependent offset) and two balanced classes, in memory."""
    rng = np.random.default_rng(seed)
    y = np.arange(n_rows) % 2
    X = (rng.standard_normal((n_rows, width)) + 1.5 * y[:, None]).astype(np.float32)
    ws = Workspace.open(f"memory://gate-{uuid.uuid4().hex}", create=True)
    ws.add_records("vib", X, chunk_rows=16)
    ws.add_labels("vib", y)
    return ws


def _evaluation(ws: Workspace, dict_id: str, pred: np.ndarray, rows: np.ndarray | None = None) -> str:
    """A hand-made evaluation of ``dict_id``: out-of-fold predictions of the features on ``rows``."""
    y = ws.labels("vib")
    rows = np.arange(y.size) if rows is None else rows
    attrs = {"dict_id": dict_id, "records": "vib", "labels": "vib", "metrics": {},
             "classes": [0, 1], "rows_fingerprint": fingerprint_params({"rows": rows.tolist(),
                                                                         "y": y[rows].tolist()})}
    return ws.append_evaluation(attrs, {"rows": rows, "pred_features": pred})


def _wrong_on(y: np.ndarray, rows) -> np.ndarray:
    pred = y.copy()
    pred[list(rows)] = 1 - pred[list(rows)]
    return pred


# ---------------------------------------------------------------------------- the rule
@pytest.mark.parametrize("d, low, outcome", [(0.02, 0.001, "promoted"), (-0.005, -0.009, "promoted"),
                                             (-0.005, -0.02, "inconclusive"), (-0.011, -0.03, "regression"),
                                             (-0.01, -0.01, "promoted")])
def test_gate_rule(d, low, outcome):
    assert gate.gate_decision({"difference": d, "low": low}, 0.01) == outcome


@pytest.mark.parametrize("tolerance", [0.0, 0.01, 0.0625])
def test_gate_rule_at_exactly_minus_tolerance(tolerance):
    below = np.nextafter(-tolerance, -np.inf)  # the next float under -tolerance
    # At the boundary the candidate passes: the margin is inclusive, for d and for low.
    assert gate.gate_decision({"difference": -tolerance, "low": -tolerance}, tolerance) == "promoted"
    # One float under it: the interval's low end fails first, then the difference itself.
    assert gate.gate_decision({"difference": -tolerance, "low": below}, tolerance) == "inconclusive"
    assert gate.gate_decision({"difference": below, "low": below}, tolerance) == "regression"


def test_a_better_candidate_with_a_wide_interval_is_inconclusive():
    # A higher score alone does not promote: the interval's low end must clear the margin.
    assert gate.gate_decision({"difference": 0.05, "low": -0.03}, 0.01) == "inconclusive"
    assert gate.gate_decision({"difference": 0.05, "low": -0.01}, 0.01) == "promoted"


def test_gate_refuses_negative_tolerance():
    with pytest.raises(InputError, match="tolerance"):
        gate.gate_decision({"difference": 0.0, "low": 0.0}, -0.1)


def test_outcome_without_comparison():
    assert gate.outcome_without_comparison(None, "d-new") == "first"
    assert gate.outcome_without_comparison("d-new", "d-new") == "unchanged"
    assert gate.outcome_without_comparison("d-old", "d-new") is None


def test_module_example():
    assert doctest.testmod(gate).failed == 0


# ---------------------------------------------------------------------------- comparison
def test_compare_scores_the_two_evaluations_and_decides():
    ws = _workspace()
    y = ws.labels("vib")
    promoted_pred = _wrong_on(y, [0, 1])             # 62 of 64 right
    better = _evaluation(ws, "d-cand", y.copy())     # 64 of 64: right wherever the promoted one is
    worse = _evaluation(ws, "d-cand", _wrong_on(y, [0, 1, 2, 3, 4, 5]))  # 58: wrong where it was right
    slightly = _evaluation(ws, "d-cand", _wrong_on(y, [0, 1, 2]))        # 61: one row worse
    old = _evaluation(ws, "d-old", promoted_pred)

    up = gate.compare(ws, better, old, metric="accuracy", tolerance=0.0, n_boot=300)
    # Reference: scikit-learn's accuracy_score of each set of predictions.
    assert up["gate"]["a"] == accuracy_score(y, y) == 1.0
    assert up["gate"]["b"] == accuracy_score(y, promoted_pred) == 62 / 64
    assert up["gate"]["difference"] == 2 / 64
    # Every row's difference is >= 0, so every resample's is: even a zero margin passes.
    assert up["gate"]["low"] >= 0.0 and up["outcome"] == "promoted"

    down = gate.compare(ws, worse, old, metric="accuracy", tolerance=0.05, n_boot=300)
    assert down["gate"]["difference"] == -4 / 64 and down["outcome"] == "regression"  # -0.0625 < -0.05
    # The same difference with the margin at exactly 4/64 is not a regression; its interval
    # reaches below the margin (resamples with more than four of those rows), so not promoted.
    edge = gate.compare(ws, worse, old, metric="accuracy", tolerance=4 / 64, n_boot=300)
    assert edge["gate"]["low"] < -4 / 64 and edge["outcome"] == "inconclusive"

    # One row worse: d = -1/64 is inside a margin of 0.02, but a resample holding that row
    # twice or more (likely over 300 resamples) puts the low end at -2/64 or below.
    thin = gate.compare(ws, slightly, old, metric="accuracy", tolerance=0.02, n_boot=300)
    assert thin["gate"]["difference"] == -1 / 64
    assert thin["gate"]["low"] <= -2 / 64 and thin["outcome"] == "inconclusive"


def test_compare_uses_the_named_metric():
    ws = _workspace()
    y = ws.labels("vib")
    cand_pred, old_pred = _wrong_on(y, [0, 2, 4, 6]), _wrong_on(y, [1])
    cand, old = _evaluation(ws, "d-cand", cand_pred), _evaluation(ws, "d-old", old_pred)
    out = gate.compare(ws, cand, old, metric="macro_f1", tolerance=0.01, n_boot=200)
    # Reference: scikit-learn's f1_score(average="macro").
    assert out["gate"]["a"] == pytest.approx(f1_score(y, cand_pred, average="macro"))
    assert out["gate"]["b"] == pytest.approx(f1_score(y, old_pred, average="macro"))
    assert out["gate"] == gate.compare_evaluations(ws, cand, old, n_boot=200)["macro_f1"]
    assert out["outcome"] == "regression"


def test_compare_refuses_other_rows_or_a_missing_evaluation():
    ws = _workspace()
    y = ws.labels("vib")
    whole = _evaluation(ws, "d-cand", y.copy())
    part = _evaluation(ws, "d-old", y[:32].copy(), rows=np.arange(32))
    with pytest.raises(InputError, match="same rows"):
        gate.compare(ws, whole, part, metric="accuracy", tolerance=0.01)
    with pytest.raises(InputError, match="complete evaluation"):
        gate.compare(ws, whole, "e-nothing", metric="accuracy", tolerance=0.01)


@pytest.fixture(scope="module")
def digits_evaluation(digits_workspace):
    ws, dict_id = digits_workspace
    return evaluate.evaluate_features(ws, "digits", dict_id, tag="digits", options=EvaluateOptions(
        folds=5, learning_curve=(0.1,), n_boot=1000, seed=0))


def test_compare_evaluations_needs_the_same_rows(digits_workspace, digits_evaluation):
    ws, dict_id = digits_workspace
    again = evaluate.evaluate_features(ws, "digits", dict_id, options=EvaluateOptions(
        baselines=(), learning_curve=(), n_boot=200))
    same = gate.compare_evaluations(ws, digits_evaluation["run_id"], again["run_id"], n_boot=200)
    assert same["accuracy"]["difference"] == same["accuracy"]["low"] == 0.0  # seeded: same predictions
    other = evaluate.evaluate_features(ws, "digits", dict_id, options=EvaluateOptions(
        baselines=(), learning_curve=(), max_rows=900, n_boot=200))
    with pytest.raises(InputError, match="same rows"):
        gate.compare_evaluations(ws, digits_evaluation["run_id"], other["run_id"])
    assert other["n_rows"] == 900


# ---------------------------------------------------------------------------- run key, records
def _atoms(seed: int) -> np.ndarray:
    W = np.random.default_rng(seed).standard_normal((4, 32))
    return W / np.linalg.norm(W, axis=1, keepdims=True)


def test_run_key_follows_records_labels_and_options_not_the_pointer():
    ws = _workspace()
    options = {"labels": None, "n_atoms": 8, "tolerance": 0.01}
    key = gate.nightly_run_key(ws, "vib", options)
    assert gate.nightly_run_key(ws, "vib", dict(options)) == key
    assert gate.nightly_run_key(ws, "vib", dict(options, tolerance=0.02)) != key
    ws.save_dictionary("d-a", _atoms(0), {"method": "test"})
    ws.promote("d-a")
    assert gate.nightly_run_key(ws, "vib", options) == key  # a moved pointer keeps the key
    ws.add_labels("vib", 1 - ws.labels("vib"), overwrite=True)
    relabelled = gate.nightly_run_key(ws, "vib", options)
    assert relabelled != key
    ws.append_records("vib", np.zeros((16, 32), np.float32), labels=np.zeros(16, np.int64))
    assert gate.nightly_run_key(ws, "vib", options) not in (key, relabelled)


def test_recorded_decision_is_stale_once_someone_else_moves_the_pointer():
    ws = _workspace()
    for i, dict_id in enumerate(("d-a", "d-b", "d-c")):
        ws.save_dictionary(dict_id, _atoms(i), {"method": "test"})
    assert gate.recorded_decision(ws, "k-1") is None  # nothing recorded
    ws.promote("d-a")
    decision_id = ws.append_decision({"outcome": "promoted", "previous_id": "d-a", "promoted_id": "d-b",
                                      "run_key": "k-1"})
    assert gate.recorded_decision(ws, "k-1")["decision_id"] == decision_id  # where that run found it
    ws.promote("d-b")
    assert gate.recorded_decision(ws, "k-1")["decision_id"] == decision_id  # where that run left it
    ws.promote("d-c")
    assert gate.recorded_decision(ws, "k-1") is None  # moved by someone else since
    assert gate.recorded_decision(ws, "k-2") is None


def _report(outcome: str, candidate_id: str, previous_id: str | None, cand_run: str | None,
            prev_run: str | None = None, gate_entry: dict | None = None) -> dict:
    return {"outcome": outcome, "candidate_id": candidate_id, "previous_id": previous_id,
            "metric": "accuracy", "tolerance": 0.01, "gate": gate_entry, "drift": None,
            "candidate": {"run_id": cand_run} if cand_run else None,
            "promoted": {"run_id": prev_run} if prev_run else None}


def test_a_regression_is_recorded_and_the_pointer_stays():
    ws = _workspace()
    ws.save_dictionary("d-old", _atoms(0), {"method": "test"})
    ws.promote("d-old")
    entry = {"a": 0.8, "b": 0.9, "difference": -0.1, "low": -0.15, "high": -0.05}
    out = gate.record_decision(ws, "vib", _report("regression", "d-cand", "d-old", "e-1", "e-0", entry),
                               run_key="k-1", recorded=None)
    assert out == {"outcome": "regression", "decision_id": out["decision_id"], "promoted_id": "d-old"}
    [decision] = ws.decisions()
    assert decision["decision_id"] == out["decision_id"]
    assert {k: decision[k] for k in ("records", "outcome", "candidate_id", "previous_id", "promoted_id",
                                     "promoted", "gate", "candidate_run", "promoted_run", "run_key")} == {
        "records": "vib", "outcome": "regression", "candidate_id": "d-cand", "previous_id": "d-old",
        "promoted_id": "d-old", "promoted": False, "gate": entry, "candidate_run": "e-1",
        "promoted_run": "e-0", "run_key": "k-1"}
    assert ws.promoted == "d-old"


@pytest.mark.parametrize("outcome", ["first", "promoted"])
def test_a_promotion_of_an_unfinished_candidate_is_refused_before_anything_is_recorded(outcome):
    ws = _workspace()
    previous = None if outcome == "first" else "d-old"
    if previous:
        ws.save_dictionary(previous, _atoms(0), {"method": "test"})
        ws.promote(previous)
    with pytest.raises(NotFound):  # the candidate dictionary was never stored
        gate.record_decision(ws, "vib", _report(outcome, "d-cand", previous, "e-1"),
                             run_key="k-1", recorded=None)
    assert ws.decisions() == [] and ws.promoted == previous


@pytest.fixture
def candidate():
    """A workspace with a dictionary trained, encoded, pooled and evaluated by the stages."""
    ws = _workspace()
    dict_id = train.train_dictionary(ws, "vib", TrainOptions(n_atoms=8, patch_size=8, stride=8,
                                                             sample_patches=200,
                                                             coder_options={"n_nonzero": 2}))["dict_id"]
    encode.encode_chunks(ws, "vib", dict_id, encode.prepare_encode(ws, "vib", dict_id)["pending"])
    pool.pool_chunks(ws, "vib", dict_id, pool.prepare_pool(ws, "vib", dict_id, PoolOptions(regions=1))["pending"])
    run = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(
        folds=2, baselines=(), learning_curve=(), n_boot=50))["run_id"]
    return ws, dict_id, run


def test_first_candidate_is_recorded_then_promoted(candidate):
    ws, dict_id, run = candidate
    out = gate.record_decision(ws, "vib", _report("first", dict_id, None, run), run_key="k-1", recorded=None)
    assert out["outcome"] == "first" and out["promoted_id"] == dict_id == ws.promoted
    [decision] = ws.decisions()
    assert (decision["decision_id"], decision["promoted"], decision["promoted_id"], decision["previous_id"]) \
        == (out["decision_id"], True, dict_id, None)


def test_a_rerun_after_a_kill_between_record_and_move_only_moves_the_pointer(candidate, monkeypatch):
    ws, dict_id, run = candidate
    report = _report("first", dict_id, None, run)

    def killed(*args, **kwargs):
        raise KeyboardInterrupt  # stands for the process dying right after the decision is written

    monkeypatch.setattr(ws, "promote", killed)
    with pytest.raises(KeyboardInterrupt):
        gate.record_decision(ws, "vib", report, run_key="k-1", recorded=None)
    monkeypatch.undo()
    assert ws.promoted is None and len(ws.decisions()) == 1
    recorded = gate.recorded_decision(ws, "k-1")
    # The rerun's own analysis says otherwise; the recorded decision is what is reported.
    again = gate.record_decision(ws, "vib", dict(report, outcome="inconclusive"), run_key="k-1",
                                 recorded=recorded)
    assert again == {"outcome": "first", "decision_id": recorded["decision_id"],
                     "already_decided": recorded["decision_id"], "promoted_id": dict_id}
    assert ws.promoted == dict_id and len(ws.decisions()) == 1
    # Once more, with the pointer already moved: nothing changes and nothing is added.
    assert gate.record_decision(ws, "vib", report, run_key="k-1",
                                recorded=gate.recorded_decision(ws, "k-1")) == again
    assert len(ws.decisions()) == 1


def test_a_promotion_whose_evaluation_measured_another_dictionary_is_refused(candidate):
    ws, dict_id, run = candidate
    ws.save_dictionary("d-other", _atoms(5), {"method": "test"})
    with pytest.raises(FingerprintMismatch, match="an evaluation of d-other"):
        gate.record_decision(ws, "vib", _report("first", "d-other", None, run), run_key="k-1", recorded=None)
    assert ws.decisions() == [] and ws.promoted is None


# ---------------------------------------------------------------------------- against raw and baselines
def _versus(y: np.ndarray, features: np.ndarray, **references: np.ndarray) -> dict:
    """A small in-memory evaluation manifest: the features' predictions compared with each
    reference's by the same paired bootstrap the evaluate stage stores in ``versus``."""
    from atomline.stages.kernels.scoring import paired_bootstrap

    return {"run_id": "ev-test", "versus": {
        name: paired_bootstrap(y, features, pred, 2, n_boot=500, seed=0)
        for name, pred in references.items()}}


Y64 = np.arange(N_ROWS) % 2


def test_features_worse_than_raw_are_refused_on_the_first_run():
    # Features wrong on 12 of 64 rows, the raw records on 2: 0.8125 against 0.96875.
    evaluation = _versus(Y64, _wrong_on(Y64, range(12)), raw=_wrong_on(Y64, range(2)))
    verdict = gate.against_references(evaluation, metric="accuracy", tolerance=0.01,
                                      beat_baselines=False)
    assert verdict["outcome"] == "below_raw"
    # The stored comparison is the one read: 0.8125 - 0.96875 computed by hand.
    assert verdict["raw"]["difference"] == 0.8125 - 0.96875 and verdict["raw"]["high"] < 0
    assert gate.STATE_NAMES["below_raw"] == "BelowRaw" and "raw records" in gate.OUTCOMES["below_raw"]


def test_features_better_than_raw_pass_and_baselines_count_only_by_option():
    # Features wrong on 0 rows, raw on 16, random patches on 8, PCA on 0 (a tie with the features).
    evaluation = _versus(Y64, Y64.copy(), raw=_wrong_on(Y64, range(16)),
                         random_patches=_wrong_on(Y64, range(8)), pca=Y64.copy())
    plain = gate.against_references(evaluation, metric="accuracy", tolerance=0.01, beat_baselines=False)
    assert plain["outcome"] is None and plain["raw"]["difference"] == 0.25
    strict = gate.against_references(evaluation, metric="accuracy", tolerance=0.01, beat_baselines=True)
    assert strict["outcome"] == "below_baseline"
    assert strict["baseline"] == "pca" and strict["versus_baseline"]["difference"] == 0.0


def test_features_that_beat_the_best_baseline_pass_with_the_option():
    evaluation = _versus(Y64, _wrong_on(Y64, range(1)), raw=_wrong_on(Y64, range(16)),
                         random_patches=_wrong_on(Y64, range(20)), pca=_wrong_on(Y64, range(10)))
    verdict = gate.against_references(evaluation, metric="accuracy", tolerance=0.01, beat_baselines=True)
    assert verdict["outcome"] is None and verdict["baseline"] == "pca"
    assert verdict["versus_baseline"]["difference"] == (63 - 54) / 64


@pytest.mark.parametrize("d, low, beats", [(0.0, 0.0, False), (0.02, -0.01, True),
                                           (0.02, -0.0101, False), (-0.005, -0.009, False)])
def test_beating_needs_a_higher_score_and_the_interval_within_the_tolerance(d, low, beats):
    assert gate.beats({"difference": d, "low": low}, 0.01) is beats


def test_beating_at_the_boundaries():
    smallest_gain = np.nextafter(0.0, 1.0)
    # The lowest interval end allowed is -tolerance itself; one float below fails.
    assert gate.beats({"difference": smallest_gain, "low": -0.01}, 0.01)
    assert not gate.beats({"difference": smallest_gain, "low": np.nextafter(-0.01, -1.0)}, 0.01)
    # A tie never beats, whatever the interval.
    assert not gate.beats({"difference": 0.0, "low": 0.0}, 0.0)


def test_best_baseline_is_the_highest_score_and_the_simpler_on_a_tie():
    tie = _versus(Y64, Y64.copy(), random_patches=_wrong_on(Y64, range(4)), pca=_wrong_on(Y64, range(4)))
    assert gate.best_baseline(tie, "accuracy") == "random_patches"
    pca = _versus(Y64, Y64.copy(), random_patches=_wrong_on(Y64, range(5)), pca=_wrong_on(Y64, range(4)))
    assert gate.best_baseline(pca, "accuracy") == "pca"
    assert gate.best_baseline(_versus(Y64, Y64.copy(), raw=Y64.copy()), "accuracy") is None


def test_the_gate_refuses_an_evaluation_without_the_references_it_needs():
    only_raw = _versus(Y64, Y64.copy(), raw=_wrong_on(Y64, range(3)))
    with pytest.raises(InputError, match="pca"):
        gate.against_references(only_raw, metric="accuracy", tolerance=0.01, beat_baselines=True)
    with pytest.raises(InputError, match="raw"):
        gate.against_references({"run_id": "ev", "versus": {}}, metric="accuracy", tolerance=0.01,
                                beat_baselines=False)
    assert gate.required_baselines(False) == ("raw",)
    assert gate.required_baselines(True) == ("raw", "random_patches", "pca")


def test_the_gate_reads_the_named_metric():
    # Three classes, unbalanced: the features are wrong only on the rare class, so their accuracy
    # beats the raw records' while balanced accuracy does not (scikit-learn as the reference).
    from sklearn.metrics import balanced_accuracy_score

    from atomline.stages.kernels.scoring import paired_bootstrap

    y = np.array([0] * 30 + [1] * 30 + [2] * 4)
    features = y.copy(); features[60:] = 0             # rare class always missed
    raw = y.copy(); raw[:12] = 1                       # twelve common rows missed
    evaluation = {"run_id": "ev", "versus": {"raw": paired_bootstrap(y, features, raw, 3, n_boot=500)}}
    assert accuracy_score(y, features) > accuracy_score(y, raw)
    assert balanced_accuracy_score(y, features) < balanced_accuracy_score(y, raw)
    assert gate.against_references(evaluation, metric="accuracy", tolerance=0.01,
                                   beat_baselines=False)["outcome"] is None
    assert gate.against_references(evaluation, metric="balanced_accuracy", tolerance=0.01,
                                   beat_baselines=False)["outcome"] == "below_raw"


def test_the_reference_lines_name_raw_and_the_best_baseline():
    evaluation = _versus(Y64, _wrong_on(Y64, range(4)), raw=_wrong_on(Y64, range(16)),
                         random_patches=_wrong_on(Y64, range(20)), pca=_wrong_on(Y64, range(2)))
    refs = gate.against_references(evaluation, metric="accuracy", tolerance=0.01, beat_baselines=False)
    assert refs["outcome"] is None  # the baseline does better, but was not asked for
    raw_line, baseline_line = gate.describe_references(refs, "accuracy", 0.01)
    # 60/64 against 48/64 and 62/64: the numbers a reader checks by hand.
    assert "features 0.938 vs 0.750, difference +0.188" in raw_line and raw_line.endswith(": beaten")
    assert "(pca)" in baseline_line and "vs 0.969, difference -0.031" in baseline_line
    assert baseline_line.endswith("NOT beaten")


@pytest.mark.parametrize("outcome, refused, final", [
    ("first", "below_raw", "below_raw"), ("promoted", "below_raw", "below_raw"),
    ("first", "below_baseline", "below_baseline"), ("first", None, "first"),
    ("promoted", None, "promoted"),
    # A regression stays one (its alert fires), and what is not promoted anyway stands.
    ("regression", "below_raw", "regression"), ("inconclusive", "below_baseline", "inconclusive"),
    ("unchanged", "below_raw", "unchanged")])
def test_references_only_stop_a_promotion(outcome, refused, final):
    assert gate.with_references(outcome, {"outcome": refused}) == final


def test_a_first_candidate_below_raw_is_recorded_and_nothing_is_promoted(candidate):
    # The records differ by class only in their mean; patches lose their mean before coding
    # (the default preprocessing), so the features cannot beat a classifier on the raw records.
    ws, dict_id, _ = candidate
    ev = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(
        folds=2, baselines=("raw",), learning_curve=(), n_boot=200))
    assert ev["raw"]["accuracy"] > 0.9 > ev["features"]["accuracy"]
    references = gate.against_references(ev, metric="accuracy", tolerance=0.01, beat_baselines=False)
    assert references["outcome"] == "below_raw"
    report = {"outcome": gate.with_references("first", references), "candidate_id": dict_id,
              "previous_id": None, "metric": "accuracy", "tolerance": 0.01, "gate": None,
              "drift": None, "references": references, "candidate": ev, "promoted": None}
    out = gate.record_decision(ws, "vib", report, run_key="k-below", recorded=None)
    assert out["outcome"] == "below_raw" and out["promoted_id"] is None and ws.promoted is None
    decision = ws.decisions()[-1]
    assert decision["promoted"] is False and decision["references"]["outcome"] == "below_raw"
