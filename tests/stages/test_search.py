"""The search stage: successive halving over configurations, its trial log and the recipe.

Data: scikit-learn's ``load_digits`` (8×8 images of handwritten digits, shipped with the
scikit-learn package). Searches run on a fixed stratified 75 % "train split"
(``train_test_split(random_state=0)``); the other 25 % is never read.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split

from atomline.stages.errors import InputError, NotFound
from atomline.stages.kernels.halving import schedule
from atomline.stages.kernels.search import score_trial
from atomline.stages.options import SearchOptions
from atomline.stages.search import (search_configurations, store_picture, store_recipe,
                                    table_text, SCREENING_NOTE)
from atomline.stages.workspace import Workspace
from atomline.stages.workspace.trials import current_recipe, recipes, search_ids, trials

#: Small and quick: 6 configurations on at most 240 rows, halving down to one.
SMALL = SearchOptions(budget=6, eta=2, seed=0, axes=("atoms", "pooling"), min_rows=60,
                      max_rows=240, folds=3)


def digits_train():
    X, y = load_digits(return_X_y=True)
    X_train, _, y_train, _ = train_test_split(X, y, test_size=0.25, stratify=y, random_state=0)
    return X_train.reshape(-1, 8, 8), y_train


@pytest.fixture()
def digits_ws(tmp_path):
    X, y = digits_train()
    ws = Workspace.open(str(tmp_path / "ws"), create=True)
    ws.add_records("digits", X.astype(np.float32), chunk_rows=200)
    ws.add_labels("digits", y)
    return ws


def test_the_schedule_is_followed_and_the_best_by_score_survive(digits_ws):
    result = search_configurations(digits_ws, "digits", "digits", SMALL)
    logged = trials(digits_ws, result["search_id"])
    expected = schedule(6, max_rows=240, min_rows=60, eta=2)
    assert [(r["candidates"], r["rows"], r["keep"]) for r in result["schedule"]] == \
        [(r.candidates, r.rows, r.keep) for r in expected]
    for k, rung in enumerate(expected):
        at_k = [t for t in logged if t["rung"] == k]
        assert len(at_k) == rung.candidates
        assert {t["rows"] for t in at_k} == {rung.rows}
        if k + 1 < len(expected):
            # Independent of survivors(): sort by score (higher first), then cost, then position.
            best = sorted(at_k, key=lambda t: (-t["score"], t["cost"], t["position"]))[:rung.keep]
            assert {t["position"] for t in logged if t["rung"] == k + 1} == \
                {t["position"] for t in best}
    # The first rung tries every configuration, the shape defaults first.
    assert [t["position"] for t in logged if t["rung"] == 0] == list(range(6))
    assert logged[0]["label"] == "defaults"
    top = result["ranked"][0]
    assert top["rung"] == len(expected) - 1 and top["rows"] == 240
    assert result["winner"] == top["configuration"]
    assert SCREENING_NOTE in table_text(result["ranked"])
    path = store_picture(digits_ws, result)
    assert path == f"reports/{result['search_id']}/search"
    assert [p["path"] for p in digits_ws.pictures()] == [path]
    png = digits_ws.picture(path)
    assert png.startswith(b"\x89PNG") and len(png) > 10_000  # a 960×720 plot, not an empty file


def test_trials_are_appended_and_a_rerun_with_the_seed_ranks_the_same(digits_ws):
    first = search_configurations(digits_ws, "digits", "digits", SMALL)
    before = trials(digits_ws)
    second = search_configurations(digits_ws, "digits", "digits", SMALL)
    after = trials(digits_ws)
    assert len(before) == len(first["trials"]) == sum(r.candidates for r in
                                                      schedule(6, max_rows=240, min_rows=60, eta=2))
    assert after[:len(before)] == before  # nothing rewritten
    assert len(after) == 2 * len(before)
    assert search_ids(digits_ws) == [first["search_id"], second["search_id"]]
    key = [(r["label"], r["rung"], r["score"]) for r in first["ranked"]]
    assert [(r["label"], r["rung"], r["score"]) for r in second["ranked"]] == key
    other = search_configurations(digits_ws, "digits", "digits",
                                  SearchOptions(**{**SMALL.__dict__, "seed": 3}))
    assert [t["rows"] for t in other["trials"]] == [t["rows"] for t in first["trials"]]
    assert [t["score"] for t in other["trials"]] != [t["score"] for t in first["trials"]]


def test_an_unfinished_trial_is_ignored_and_removed_by_the_next_writer(digits_ws):
    from atomline.stages.workspace.trials import append_trial

    append_trial(digits_ws, {"search_id": "s0", "rung": 0, "score": 0.5})
    cut = digits_ws.root.require_group("trials").create_group("t0-killed")
    cut.attrs.update({"search_id": "s0", "id": "t0-killed"})  # its writer died before "complete"
    assert [t["score"] for t in trials(digits_ws)] == [0.5]
    append_trial(digits_ws, {"search_id": "s0", "rung": 0, "score": 0.7})
    assert "t0-killed" not in digits_ws.root["trials"]
    assert [t["score"] for t in trials(digits_ws, "s0")] == [0.5, 0.7]
    with pytest.raises(InputError):
        append_trial(digits_ws, {"rung": 0})


def test_the_winner_is_stored_as_a_recipe_with_its_source(digits_ws):
    assert current_recipe(digits_ws) is None
    result = search_configurations(digits_ws, "digits", "digits", SMALL)
    store_recipe(digits_ws, result, "digits-best")
    recipe = current_recipe(digits_ws)
    assert recipe["name"] == "digits-best"
    assert recipe["configuration"] == result["winner"]
    assert recipe["source"]["search_id"] == result["search_id"]
    assert recipe["source"]["trial_id"] == result["ranked"][0]["trial_id"]
    # A later recipe of the same name supersedes it; the older entry stays in the log.
    store_recipe(digits_ws, {**result, "ranked": result["ranked"][1:]}, "digits-best")
    assert len(recipes(digits_ws)) == 2
    assert current_recipe(digits_ws, "digits-best")["configuration"] == \
        result["ranked"][1]["configuration"]
    with pytest.raises(NotFound):
        current_recipe(digits_ws, "no-such-recipe")
    with pytest.raises(InputError):
        store_recipe(digits_ws, result, "bad name/")


def test_search_options_refuse_what_cannot_work():
    with pytest.raises(InputError, match="eta"):
        SearchOptions(eta=1)
    with pytest.raises(InputError, match="axes"):
        SearchOptions(axes=("patch", "colour"))
    with pytest.raises(InputError, match="max_rows"):
        SearchOptions(min_rows=500, max_rows=100)


@pytest.mark.slow
def test_the_digits_winner_beats_the_raw_classifier_by_cross_validation(tmp_path):
    # Data: scikit-learn's digits, train split only (see the module docstring). The search
    # picks on its own rows and folds (seed 0); the check is a fresh 5-fold cross-validation
    # with another seed over the whole train split, against the raw pixels' classifier on
    # the same folds (scikit-learn's LogisticRegression on standardised pixels).
    X, y = digits_train()
    ws = Workspace.open(str(tmp_path / "ws"), create=True)
    ws.add_records("digits", X.astype(np.float32), chunk_rows=200)
    ws.add_labels("digits", y)
    result = search_configurations(ws, "digits", "digits",
                                   SearchOptions(budget=6, eta=3, min_rows=150, max_rows=900))
    checked = score_trial(result["winner"], X, y, folds=5, seed=1)
    assert checked["score"] > checked["raw"], (result["ranked"][0]["label"], checked)


def test_train_and_pool_use_the_recipe_below_the_options_given(digits_ws):
    from atomline.stages.encode import encode_chunks, prepare_encode
    from atomline.stages.options import PoolOptions, TrainOptions
    from atomline.stages.pool import prepare_pool
    from atomline.stages.train import train_dictionary

    result = search_configurations(digits_ws, "digits", "digits", SMALL)
    recipe_id = store_recipe(digits_ws, result, "digits-best")
    winner = result["winner"]
    made = train_dictionary(digits_ws, "digits", TrainOptions(sample_patches=2000))
    attrs = digits_ws.load_dictionary(made["dict_id"]).attrs
    assert attrs["search_recipe"] == recipe_id
    assert attrs["n_atoms"] == winner["n_atoms"]
    assert attrs["geometry"]["size"] == winner["patch_size"]
    assert attrs["geometry"]["stride"] == winner["stride"]
    assert attrs["sample_patches"] == 2000  # given: wins over the recipe
    explicit = train_dictionary(digits_ws, "digits", TrainOptions(n_atoms=winner["n_atoms"] + 3,
                                                                  sample_patches=2000))
    assert digits_ws.load_dictionary(explicit["dict_id"]).attrs["n_atoms"] == winner["n_atoms"] + 3
    todo = prepare_encode(digits_ws, "digits", made["dict_id"])
    encode_chunks(digits_ws, "digits", made["dict_id"], todo["pending"])
    pooled = prepare_pool(digits_ws, "digits", made["dict_id"], PoolOptions())
    assert digits_ws.output(pooled["output"]).attrs["params"]["regions"] == winner["regions"]
    assert digits_ws.output(pooled["output"]).attrs["params"]["reduce"] == winner["reduce"]
