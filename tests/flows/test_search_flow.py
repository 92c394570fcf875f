"""The search flow: one mapped task per trial, the ranked table artifact, picture and recipe.

Data: scikit-learn's ``load_digits`` (8×8 images shipped with scikit-learn), first 300 rows.
"""

from __future__ import annotations

import uuid

import numpy as np
import pytest
from prefect.client.orchestration import get_client
from prefect.client.schemas.filters import (ArtifactFilter, ArtifactFilterKey, FlowRunFilter,
                                            FlowRunFilterId)
from sklearn.datasets import load_digits

from atomline.flows.artifacts import artifact_key
from atomline.flows.search import search_flow
from atomline.stages.kernels.halving import schedule
from atomline.stages.options import SearchOptions
from atomline.stages.workspace import Workspace
from atomline.stages.workspace.trials import current_recipe, trials

pytestmark = pytest.mark.usefixtures("prefect_harness")

SMALL = SearchOptions(budget=4, eta=2, axes=("atoms", "pooling"), min_rows=60, max_rows=150)


def test_search_flow_maps_each_trial_and_publishes_the_ranked_table(tmp_path):
    X, y = load_digits(return_X_y=True)
    url = str(tmp_path / "ws")
    ws = Workspace.open(url, create=True)
    ws.add_records("digits", X[:300].reshape(-1, 8, 8).astype(np.float32), chunk_rows=100)
    ws.add_labels("digits", y[:300])
    name = f"d{uuid.uuid4().hex[:8]}"
    state = search_flow(url, "digits", search=SMALL, recipe=name, return_state=True)
    result = state.result()
    n_trials = sum(r.candidates for r in schedule(4, max_rows=150, min_rows=60, eta=2))
    assert len(trials(ws, result["search_id"])) == n_trials
    with get_client(sync_client=True) as client:
        runs = client.read_task_runs(flow_run_filter=FlowRunFilter(
            id=FlowRunFilterId(any_=[state.state_details.flow_run_id])))
        tables = client.read_artifacts(artifact_filter=ArtifactFilter(
            key=ArtifactFilterKey(any_=[artifact_key("digits", "search")])))
    assert sum(r.name.startswith("search-trial") for r in runs) == n_trials
    mine = [a for a in tables if a.flow_run_id == state.state_details.flow_run_id]
    assert len(mine) == 1
    shown = mine[0].data
    rows = shown if isinstance(shown, list) else __import__("json").loads(shown)
    assert [r["configuration"] for r in rows] == [r["label"] for r in result["ranked"]]
    assert "not a safety or maintenance decision" in mine[0].description
    assert result["picture"] in [p["path"] for p in ws.pictures()]
    assert current_recipe(ws, name)["configuration"] == result["winner"]


def test_nightly_after_a_search_trains_and_pools_with_the_recipe(tmp_path):
    from atomline.flows import nightly_flow
    from atomline.stages.options import EvaluateOptions, ReportOptions, TrainOptions

    # Without the recipe the default nightly (whole-record patch, 4 regions) cannot pool
    # 8×8 images; after the search it uses the recipe's patch, atoms and regions.
    X, y = load_digits(return_X_y=True)
    url = str(tmp_path / "ws")
    ws = Workspace.open(url, create=True)
    ws.add_records("digits", X[:300].reshape(-1, 8, 8).astype(np.float32), chunk_rows=100)
    ws.add_labels("digits", y[:300])
    found = search_flow(url, "digits", search=SMALL, recipe="digits-best")
    winner = found["winner"]
    report = nightly_flow(url, "digits", train=TrainOptions(sample_patches=3000),
                          evaluate=EvaluateOptions(folds=3, n_boot=200, learning_curve=()),
                          report=ReportOptions(pictures=False))
    dict_id = report["candidate"]["dict_id"]
    attrs = ws.load_dictionary(dict_id).attrs
    assert attrs["search_recipe"] == found["recipe_id"]
    assert (attrs["n_atoms"], attrs["geometry"]["size"]) == (winner["n_atoms"], winner["patch_size"])
    pooled = ws.output(f"features/{dict_id}/digits").attrs["params"]
    assert (pooled["regions"], pooled["reduce"]) == (winner["regions"], winner["reduce"])


def test_search_command_prints_the_ranked_table_and_stores_the_recipe(tmp_path, capsys):
    import json

    from atomline.flows.cli import main

    X, y = load_digits(return_X_y=True)
    url = str(tmp_path / "ws")
    ws = Workspace.open(url, create=True)
    ws.add_records("digits", X[:200].reshape(-1, 8, 8).astype(np.float32), chunk_rows=100)
    ws.add_labels("digits", y[:200])
    flags = ["--budget", "3", "--reduction", "2", "--axes", "atoms", "--min-rows", "60",
             "--max-rows", "120", "--recipe", "from-cli", "--workers", "1"]
    assert main(["search", url, "digits", *flags, "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert [r["rank"] for r in shown["ranked"]] == [1, 2, 3]
    assert current_recipe(ws, "from-cli")["configuration"] == shown["winner"]
    assert main(["search", url, "digits", *flags]) == 0
    text = capsys.readouterr().out
    assert "defaults" in text and "not a safety or maintenance decision" in text
