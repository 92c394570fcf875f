"""A worker that raises mid-batch under the Dask runner: Prefect retries the batch and the
flow finishes with the bytes of an uninterrupted run (finished chunks are not redone)."""

from __future__ import annotations

import shutil

import pytest
from conftest import store_snapshot

from atomline.stages import encode, train
from atomline.stages.workspace import Workspace
from atomline.stages.options import TrainOptions

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("prefect_harness")]


def test_batch_raising_mid_way_is_retried_under_dask(tmp_path, demo_small, monkeypatch):
    from prefect_dask import DaskTaskRunner

    from atomline.flows import encode_flow
    from atomline.stages.options import RunnerOptions

    X, _ = demo_small
    url = str(tmp_path / "ws.zarr")
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X[:120], chunk_rows=10)
    dict_id = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=16, patch_size=128, stride=128, sample_patches=1000, seed=0))["dict_id"]
    reference = str(tmp_path / "reference.zarr")
    shutil.copytree(url, reference)
    p = encode.prepare_encode(reference, "vib", dict_id)
    encode.encode_chunks(reference, "vib", dict_id, p["pending"])

    # The second chunk of every batch fails once, after the first chunk was committed.
    real_code, calls, failed = encode.code, {}, []

    def flaky(patches, atoms, *args, **kwargs):
        calls["n"] = calls.get("n", 0) + 1
        if calls["n"] == 2:
            failed.append(True)
            raise RuntimeError("worker lost its connection")
        return real_code(patches, atoms, *args, **kwargs)

    monkeypatch.setattr(encode, "code", flaky)
    runner = DaskTaskRunner(cluster_kwargs={"n_workers": 1, "processes": False,
                                            "threads_per_worker": 1, "dashboard_address": ":0",
                                            "local_directory": str(tmp_path / "dask")})
    summary = encode_flow.with_options(task_runner=runner)(
        url, "vib", dict_id=dict_id, runner=RunnerOptions(workers=1, batches_per_worker=2))
    assert failed == [True]
    # The retry skipped the chunk the failed attempt had committed, and coded the rest.
    assert summary["skipped"] == 1 and summary["encoded"] == p["n_chunks"] - 1
    path = encode.codes_path(dict_id, "vib")
    got = {k: v for k, v in store_snapshot(Workspace.open(url)).items() if k.startswith(path) and "/c/" in k}
    ref = {k: v for k, v in store_snapshot(Workspace.open(reference)).items() if k.startswith(path) and "/c/" in k}
    assert got == ref
