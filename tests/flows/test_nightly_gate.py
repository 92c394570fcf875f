"""The nightly gate under Prefect: a worse retrain is a marked regression, the history
keeps both, artifacts are created and read back, the schedule deployment is built."""

from __future__ import annotations

import dataclasses
import json
import uuid

import pytest
from prefect.client.orchestration import get_client
from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey

from atomline.flows import STATE_NAMES, evaluate_flow, nightly_flow
from atomline.flows.artifacts import artifact_key
from atomline.flows.cli import main
from atomline.stages.options import (DriftOptions, EvaluateOptions, GateOptions, PoolOptions,
                                     ReportOptions, RunnerOptions, TrainOptions)
from atomline.stages.workspace import Workspace

pytestmark = [pytest.mark.usefixtures("prefect_harness"), pytest.mark.slow]

TRAIN = TrainOptions(n_atoms=48, patch_size=64, stride=32, sample_patches=6000,
                     coder_options={"n_nonzero": 4})
GOOD = dict(train=TRAIN, pool=PoolOptions(regions=2), runner=RunnerOptions(workers=2),
            evaluate=EvaluateOptions(baselines=["raw"], learning_curve=[0.2], n_boot=500))
WORSE = dict(GOOD, train=dataclasses.replace(TRAIN, n_atoms=2, coder_options={"n_nonzero": 1},
                                             sample_patches=500))


@pytest.fixture(scope="module")
def archive(demo_small):
    X, y = demo_small
    url = f"memory://gate-{uuid.uuid4().hex}"
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X, chunk_rows=60)
    ws.add_labels("vib", y)
    return url


@pytest.fixture(scope="module")
def two_nights(archive):
    first = nightly_flow(archive, "vib", return_state=True, **GOOD)
    second = nightly_flow(archive, "vib", return_state=True, gate=GateOptions(tolerance=0.01), **WORSE)
    return first, second


def _read_artifacts(key: str) -> list:
    with get_client(sync_client=True) as client:
        return client.read_artifacts(artifact_filter=ArtifactFilter(key=ArtifactFilterKey(any_=[key])))


def test_worse_retrain_is_a_marked_regression(archive, two_nights):
    first, second = two_nights
    one, two = first.result(), second.result()
    assert first.is_completed() and first.name == STATE_NAMES["first"] == "Promoted"
    assert one["outcome"] == "first" and one["promoted_id"] == one["candidate_id"]
    # The second night: a 2-atom dictionary, far worse; not promoted, marked.
    assert second.is_completed() and second.name == "Regression"
    assert second.message.startswith("regression:")
    assert two["outcome"] == "regression"
    gate = two["gate"]
    assert gate["difference"] < -0.01 and gate["high"] < 0  # worse beyond noise too
    assert gate["a"] == two["candidate"]["features"]["accuracy"]
    assert gate["b"] == two["promoted"]["features"]["accuracy"]
    ws = Workspace.open(archive)
    assert ws.promoted == one["candidate_id"] != two["candidate_id"]
    # History: both candidates' evaluations and both decisions.
    candidates = [e for e in ws.evaluations() if e["tag"] == "candidate"]
    assert [e["dict_id"] for e in candidates] == [one["candidate_id"], two["candidate_id"]]
    assert [d["outcome"] for d in ws.decisions()] == ["first", "regression"]
    assert ws.decisions()[1]["candidate_run"] == two["candidate"]["run_id"]


def test_history_command_shows_both(archive, two_nights, capsys):
    _, second = two_nights
    assert main(["history", archive, "vib", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    rows = [r for r in out["evaluations"] if r["tag"] == "candidate"]
    assert [r["outcome"] for r in rows] == ["first", "regression"]
    assert rows[1]["accuracy"] == second.result()["candidate"]["features"]["accuracy"]
    assert rows[0]["coder"] == "omp" and rows[0]["pooling"]["regions"] == 2
    assert main(["history", archive]) == 0
    table = capsys.readouterr().out
    assert "regression" in table and "accuracy" in table.splitlines()[0]


def test_artifacts_are_created_and_read_back(archive, two_nights):
    _, second = two_nights
    report = second.result()
    summaries = _read_artifacts(artifact_key("vib", "summary"))
    assert {str(a.flow_run_id) for a in summaries} >= {str(second.state_details.flow_run_id)}
    mine = [a for a in summaries if a.flow_run_id == second.state_details.flow_run_id][-1]
    assert mine.type == "markdown"
    assert "**Outcome: Regression**" in mine.data and report["candidate_id"] in mine.data
    assert "data:image/png;base64," in mine.data  # the pictures are embedded
    tables = [a for a in _read_artifacts(artifact_key("vib", "scores"))
              if a.flow_run_id == second.state_details.flow_run_id]
    rows = json.loads(tables[-1].data)
    assert [r["set"] for r in rows] == ["features", "raw"]
    assert rows[0]["accuracy"] == round(report["candidate"]["features"]["accuracy"], 4)
    progress = [a for a in _read_artifacts(artifact_key("vib", "encode-progress"))
                if a.flow_run_id == second.state_details.flow_run_id]
    assert progress and all(a.type == "progress" for a in progress)
    assert max(float(a.data) for a in progress) == 100.0
    assert len(report["pictures"]) == 5


def test_fail_on_regression_ends_in_failed_state(archive, two_nights):
    ws = Workspace.open(archive)
    history = (len(ws.evaluations()), len(ws.decisions()))
    state = nightly_flow(archive, "vib", return_state=True,
                         gate=GateOptions(tolerance=0.01, fail_on_regression=True), **WORSE)
    assert state.is_failed() and state.name == "Regression"
    report = state.result(raise_on_failure=False)
    assert report["outcome"] == "regression"
    # The second night's inputs again: its decision is reported (alerting options are not
    # part of the run's key), and nothing is evaluated or decided twice.
    second = two_nights[1].result()
    assert report["already_decided"] == second["decision_id"]
    assert report["gate"] == second["gate"] and report["promoted"]["run_id"] == second["promoted"]["run_id"]
    assert (len(ws.evaluations()), len(ws.decisions())) == history


def test_evaluate_flow_stores_pictures_and_artifacts(archive, two_nights):
    manifest = evaluate_flow(archive, "vib", evaluate=EvaluateOptions(baselines=["raw"], learning_curve=[],
                                                                      n_boot=100),
                             report=ReportOptions(class_names=["steady", "impacts", "mesh", "rub"]))
    ws = Workspace.open(archive)
    assert [p.split("/")[1] for p in manifest["pictures"]] == [manifest["run_id"]] * 4
    assert {p["path"] for p in ws.pictures()} >= set(manifest["pictures"])


def test_serve_builds_a_cron_deployment(archive, capsys):
    assert main(["serve", archive, "vib", "--cron", "30 3 * * *", "--atoms", "32",
                 "--patch-size", "64", "--dry-run", "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["deployment"] == "atomline-nightly-vib" and info["flow"] == "atomline-nightly"
    assert info["schedules"] == [{"cron": "30 3 * * *", "timezone": "UTC"}]
    assert info["parameters"]["train"]["n_atoms"] == 32 and info["parameters"]["workspace"] == archive
    assert info["served"] is False
    # The parameters are the flow's own, as Prefect checks for each scheduled run.
    import inspect

    from atomline.flows.cli import _parser, serve_deployment

    deployment = serve_deployment(_parser().parse_args(["serve", archive, "vib", "--dry-run"]))
    assert set(deployment.parameters) <= set(inspect.signature(nightly_flow.fn).parameters)
    assert deployment.parameters["gate"]["tolerance"] == 0.01 and deployment.enforce_parameter_schema


def test_no_drift_means_no_retrain(archive, two_nights):
    ws = Workspace.open(archive)
    before = ws.dictionary_ids()
    report = nightly_flow(archive, "vib", drift=DriftOptions(retrain_on_drift=True, drift_since=300),
                          **GOOD)
    assert report["outcome"] == "steady" and not report["drift"]["drifted"]
    assert report["drift"]["new"]["rows"] == [300, 600]
    assert ws.dictionary_ids() == before  # nothing trained
    assert report["encode"]["encoded"] == 0  # the promoted features were already complete
    assert ws.decisions()[-1]["outcome"] == "steady"


def test_show_and_plots_list_and_export_pictures(archive, two_nights, tmp_path, capsys):
    assert main(["show", archive, "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["decisions"] >= 2 and len(shown["pictures"]) >= 5
    assert main(["plots", archive, "--export", str(tmp_path), "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)["pictures"]
    first = listed[0]
    with open(first["file"], "rb") as fh:
        assert fh.read() == Workspace.open(archive).picture(first["path"])
    assert main(["show", archive]) == 0
    assert "pictures (" in capsys.readouterr().out
