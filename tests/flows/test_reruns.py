"""Reruns add nothing twice: evaluations found by their key, unfinished entries of the
append-only logs ignored and removed, pictures stored without attributes replaced, and a
promotion checked apart from the pointer move."""

from __future__ import annotations

import numpy as np
import pytest

from atomline.stages import encode, evaluate, pool, train
from atomline.stages import report as pictures
from atomline.stages.errors import FingerprintMismatch
from atomline.stages.workspace import Workspace
from atomline.stages.options import EvaluateOptions, PoolOptions, TrainOptions

QUICK = dict(baselines=(), learning_curve=(), n_boot=100, folds=3)


@pytest.fixture
def small(memory_url, demo_small):
    """120 demo records, a 16-atom dictionary, its codes and features (no Prefect)."""
    X, y = demo_small
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("vib", X[:120], chunk_rows=30)
    ws.add_labels("vib", y[:120])
    dict_id = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=16, patch_size=128, stride=128, sample_patches=1000, seed=0, coder_options={"n_nonzero": 3}))["dict_id"]
    encode.encode_chunks(ws, "vib", dict_id, encode.prepare_encode(ws, "vib", dict_id)["pending"])
    pool.pool_chunks(ws, "vib", dict_id, pool.prepare_pool(ws, "vib", dict_id, options=PoolOptions(regions=2))["pending"])
    return ws, dict_id


def test_a_rerun_finds_the_evaluation_with_the_same_key(small):
    ws, dict_id = small
    first = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**QUICK))
    again = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**QUICK))
    assert first["reused"] is False and again["reused"] is True
    assert again == dict(first, reused=True)
    assert [e["run_id"] for e in ws.evaluations()] == [first["run_id"]]
    key = ws.evaluation(first["run_id"])["key"]
    assert ws.find_evaluation(key)["run_id"] == first["run_id"]
    # Anything the result depends on changes the key: another seed is a second evaluation.
    other = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**dict(QUICK, seed=1)))
    assert other["reused"] is False and other["run_id"] != first["run_id"]
    assert len(ws.evaluations()) == 2


def test_unfinished_evaluation_is_ignored_then_removed_by_the_next_append(small):
    ws, dict_id = small
    done = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**QUICK))
    # What a writer killed after its arrays and attributes leaves: no `complete`.
    torn = ws.root.create_group("evaluations/e00000000T000000000000-dead00")
    torn.create_array("rows", data=np.arange(5))
    torn.attrs.update(dict(ws.evaluation(done["run_id"]), run_id="e00000000T000000000000-dead00",
                           complete=False))
    assert [e["run_id"] for e in ws.evaluations()] == [done["run_id"]]
    assert ws.find_evaluation(ws.evaluation(done["run_id"])["key"])["run_id"] == done["run_id"]
    evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**dict(QUICK, seed=2)))
    assert "e00000000T000000000000-dead00" not in set(ws.root["evaluations"].group_keys())
    assert len(ws.evaluations()) == 2
    assert ws.lease_holder("evaluations") is None


def test_unfinished_decision_is_ignored_then_removed(small):
    ws, _ = small
    ws.root.require_group("decisions").create_group("g0-dead").attrs.update(
        {"decision_id": "g0-dead", "run_key": "k", "outcome": "first"})
    assert ws.decisions() == [] and ws.find_decision("k") is None
    made = ws.append_decision({"outcome": "regression", "run_key": "k"})
    assert list(ws.root["decisions"].group_keys()) == [made]
    assert ws.find_decision("k")["decision_id"] == made
    assert ws.find_decision("other") is None


def test_pictures_without_attributes_are_ignored_and_replaced(small):
    ws, dict_id = small
    run_id = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**QUICK))["run_id"]
    # A kill between a picture's bytes and its attributes: an array with no media type.
    ws.root.require_group("reports").require_group(run_id)
    ws.root.create_array(f"reports/{run_id}/atoms", data=np.frombuffer(b"\x89PNG half", np.uint8))
    assert ws.pictures() == []
    paths = pictures.render_report(ws, run_id)
    assert [p.split("/")[-1] for p in paths] == ["atoms", "usage", "history", "confusion"]
    assert ws.picture(paths[0]).startswith(b"\x89PNG\r\n\x1a\n") and len(ws.picture(paths[0])) > 1000
    stored = {p["path"]: ws.picture(p["path"]) for p in ws.pictures()}
    # Rendering again keeps the stored pictures as they are and adds none.
    assert pictures.render_report(ws, run_id) == paths
    assert {p["path"]: ws.picture(p["path"]) for p in ws.pictures()} == stored


def test_checking_a_promotion_moves_nothing(small):
    ws, dict_id = small
    run_id = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**QUICK))["run_id"]
    ws.check_promotion(dict_id, evaluation=run_id)
    assert ws.promoted is None
    other = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=8, patch_size=128, stride=128, sample_patches=1000, seed=1, coder_options={"n_nonzero": 2}))["dict_id"]
    with pytest.raises(FingerprintMismatch, match="an evaluation of"):
        ws.check_promotion(other, evaluation=run_id)
    ws.promote(dict_id, evaluation=run_id)
    assert ws.promoted == dict_id
