"""The Prefect flows on a small demo archive: nightly chain, promotion gate, runners."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from atomline.flows import encode_flow, nightly_flow
from atomline.flows.cli import main
from atomline.flows.runners import plan_batches, task_runner
from atomline.stages.errors import InputError
from atomline.stages.options import EncodeOptions, GateOptions, PoolOptions, RunnerOptions, TrainOptions
from atomline.stages.workspace import Workspace

pytestmark = pytest.mark.usefixtures("prefect_harness")

TRAIN = TrainOptions(n_atoms=48, patch_size=64, stride=32, sample_patches=6000,
                     coder_options={"n_nonzero": 4})
NIGHTLY = dict(train=TRAIN, pool=PoolOptions(regions=2), runner=RunnerOptions(workers=2))


@pytest.fixture(scope="module")
def archive(demo_small):
    X, y = demo_small
    url = "memory://flows-archive"
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X, chunk_rows=40)
    ws.add_labels("vib", y)
    return url


def test_nightly_learns_encodes_pools_and_beats_raw(archive, capsys, monkeypatch):
    opened = []
    real_open = Workspace.open.__func__

    def counting_open(cls, url, **kwargs):
        opened.append(str(url))
        return real_open(cls, url, **kwargs)

    monkeypatch.setattr(Workspace, "open", classmethod(counting_open))
    report = nightly_flow.with_options(task_runner=task_runner("threads", 2))(archive, "vib", **NIGHTLY)
    monkeypatch.undo()
    # Every task of the flow (train, encode and pool batches, evaluations, gate, report) runs
    # in this process on threads: the store is opened once for all of them (none if an
    # earlier test of the session already opened this URL).
    assert opened.count(archive) <= 1
    assert report["outcome"] == "first"
    assert report["promoted_id"] == report["candidate_id"] == Workspace.open(archive).promoted
    assert report["encode"]["encoded"] == report["encode"]["n_chunks"] == 15
    cand = report["candidate"]
    # The demo's classes differ only by where-ever-they-occur waveforms: raw samples are
    # near chance (4 classes), pooled sparse codes separate them. A clear margin:
    assert cand["raw"]["accuracy"] < 0.45
    assert cand["features"]["accuracy"] > cand["raw"]["accuracy"] + 0.30

    # The same inputs again: the recorded decision is reported, nothing is added twice.
    ws = Workspace.open(archive)
    history = (len(ws.evaluations()), len(ws.decisions()))
    again = nightly_flow(archive, "vib", **NIGHTLY)
    assert again["outcome"] == "first" and again["already_decided"] == report["decision_id"]
    assert again["candidate"]["run_id"] == cand["run_id"] and again["candidate"]["reused"]
    assert again["encode"]["encoded"] == 0 and again["encode"]["skipped"] == 15
    assert (len(ws.evaluations()), len(ws.decisions())) == history == (1, 1)
    # The command line with the same options says so.
    capsys.readouterr()
    assert main(["nightly", archive, "vib", "--atoms", "48", "--patch-size", "64", "--stride", "32",
                 "--sample", "6000", "--regions", "2", "--nonzero", "4"]) == 0
    assert f"these inputs were decided already ({report['decision_id']})" in capsys.readouterr().out
    assert (len(ws.evaluations()), len(ws.decisions())) == (1, 1)
    # Other options that reach the same dictionary are a new run: nothing to promote.
    other = nightly_flow(archive, "vib", gate=GateOptions(tolerance=0.02), **NIGHTLY)
    assert other["outcome"] == "unchanged" and "already_decided" not in other


def test_gate_keeps_the_better_dictionary(archive):
    promoted = Workspace.open(archive).promoted
    assert promoted is not None  # set by the test above
    worse = dict(NIGHTLY, train=dataclasses.replace(TRAIN, n_atoms=2, coder_options={"n_nonzero": 1},
                                                   sample_patches=500))
    report = nightly_flow(archive, "vib", gate=GateOptions(tolerance=0.0), **worse)
    assert report["outcome"] == "regression"
    assert report["candidate"]["features"]["accuracy"] < report["promoted"]["features"]["accuracy"]
    assert Workspace.open(archive).promoted == promoted
    tags = [e["tag"] for e in Workspace.open(archive).evaluations()]
    assert tags[-2:] == ["candidate", "promoted"]


@pytest.mark.parametrize("workers", [1, 3])
def test_encode_flow_same_codes_for_any_worker_count(archive, workers):
    ws = Workspace.open(archive)
    dict_id = ws.promoted
    reference = {k: ws.root[f"codes/{dict_id}/vib/{k}"][:] for k in ("index", "value", "count")}
    summary = encode_flow.with_options(task_runner=task_runner("threads", workers))(
        archive, "vib", dict_id=dict_id,
        encode=EncodeOptions(coder="omp", coder_options={"n_nonzero": 4}),
        runner=RunnerOptions(workers=workers), overwrite=True)
    assert summary["encoded"] == 15
    for k, ref in reference.items():
        np.testing.assert_array_equal(ws.root[f"codes/{dict_id}/vib/{k}"][:], ref)


def test_plan_batches_covers_chunks_in_order():
    batches = plan_batches(list(range(10)), workers=2, per_worker=2)
    assert batches == [[0, 1, 2], [3, 4, 5], [6, 7], [8, 9]]
    assert plan_batches([4, 9], workers=4) == [[4], [9]]
    assert plan_batches([], workers=2) == []
    with pytest.raises(InputError, match="runner"):
        task_runner("cluster")
    with pytest.raises(InputError, match="workers"):
        task_runner("threads", 0)
