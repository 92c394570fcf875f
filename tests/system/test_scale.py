"""Scale: object storage through storage options, appended rows, other task runners.

Outside references used here: moto's S3 server (a general-purpose AWS emulator) stands in
for object storage and is reached through the real s3fs client; Dask's LocalCluster runs
the tasks in separate worker processes. The byte-for-byte comparisons are against the
thread runner and against a from-scratch encode of the same rows.
"""

from __future__ import annotations

import json
import logging
import os
import shutil

import numpy as np
import pytest

from atomline.flows import encode_flow, evaluate_flow, nightly_flow, pool_flow, train_flow
from atomline.flows.runners import task_runner
from atomline.stages import encode, pool
from atomline.stages.errors import InputError, LayoutError, NotFound
from atomline.stages.options import (EvaluateOptions, GateOptions, PoolOptions, ReportOptions,
                                     RunnerOptions, TrainOptions)
from atomline.stages.workspace import STORAGE_OPTIONS_ENV, Workspace, resolve_storage_options
from atomline.stages.options import PoolOptions, TrainOptions

NIGHTLY = dict(train=TrainOptions(n_atoms=32, patch_size=64, stride=32, sample_patches=3000,
                                 coder_options={"n_nonzero": 4}),
               pool=PoolOptions(regions=2), runner=RunnerOptions(workers=2),
               evaluate=EvaluateOptions(learning_curve=[], n_boot=200),
               report=ReportOptions(pictures=False))


# ---------------------------------------------------------------------------- helpers
def _arrays(ws: Workspace, dict_id: str, name: str) -> dict[str, np.ndarray]:
    codes = ws.output(encode.codes_path(dict_id, name)).group
    feats = ws.output(pool.features_path(dict_id, name)).group
    out = {k: codes[k][:] for k in ("index", "value", "count")}
    out["features"] = feats["values"][:]
    out["codes_done"] = codes["done"][:]
    out["features_done"] = feats["done"][:]
    return out


def _chunk_files(root: str, prefixes: tuple[str, ...]) -> dict[str, bytes]:
    """Every data chunk file (not metadata, which holds creation times) under the prefixes."""
    out = {}
    for prefix in prefixes:
        for dirpath, _, files in os.walk(os.path.join(root, prefix)):
            for f in files:
                if f != "zarr.json":
                    path = os.path.join(dirpath, f)
                    with open(path, "rb") as fh:
                        out[os.path.relpath(path, root)] = fh.read()
    return out


def _reference_encode(X, y, stored, chunk_rows: int, regions: int) -> dict[str, np.ndarray]:
    """Encode and pool all rows from scratch, in a fresh workspace, with the same dictionary."""
    import uuid

    ws = Workspace.open(f"memory://reference-{uuid.uuid4().hex}", create=True)
    ws.add_records("vib", X, chunk_rows=chunk_rows)
    ws.add_labels("vib", y)
    meta = {k: v for k, v in stored.attrs.items()
            if k not in ("fingerprint", "created", "version", "prep_arrays", "complete")}
    ws.save_dictionary(stored.dict_id, stored.atoms, meta, stored.arrays)
    prepared = encode.prepare_encode(ws, "vib", stored.dict_id)
    encode.encode_chunks(ws, "vib", stored.dict_id, prepared["pending"])
    pooled = pool.prepare_pool(ws, "vib", stored.dict_id, options=PoolOptions(regions=regions))
    pool.pool_chunks(ws, "vib", stored.dict_id, pooled["pending"])
    return _arrays(ws, stored.dict_id, "vib")


# ---------------------------------------------------------------------------- storage options
def test_storage_options_come_from_code_or_environment(monkeypatch, tmp_path):
    monkeypatch.delenv(STORAGE_OPTIONS_ENV, raising=False)
    assert resolve_storage_options("/some/dir", {"key": "x"}) is None  # local: none apply
    assert resolve_storage_options("s3://b/ws") is None
    assert resolve_storage_options("s3://b/ws", {"anon": True}) == {"anon": True}
    monkeypatch.setenv(STORAGE_OPTIONS_ENV, json.dumps({"key": "k1", "secret": "TOPSECRET"}))
    assert resolve_storage_options("s3://b/ws") == {"key": "k1", "secret": "TOPSECRET"}
    assert resolve_storage_options("s3://b/ws", {"anon": True}) == {"anon": True}  # code wins
    path = tmp_path / "opts.json"
    path.write_text(json.dumps({"client_kwargs": {"endpoint_url": "http://h:1"}}))
    monkeypatch.setenv(STORAGE_OPTIONS_ENV, f"@{path}")
    assert resolve_storage_options("s3://b/ws") == {"client_kwargs": {"endpoint_url": "http://h:1"}}
    # A malformed value is refused without repeating it (it may hold a secret).
    monkeypatch.setenv(STORAGE_OPTIONS_ENV, '["TOPSECRET"]')
    with pytest.raises(InputError) as err:
        resolve_storage_options("s3://b/ws")
    assert "TOPSECRET" not in str(err.value)
    # Credentials inside the URL would end up in flow parameters and logs: refused.
    with pytest.raises(InputError) as err:
        Workspace.open("s3://AKID:TOPSECRET@bucket/ws")
    assert "TOPSECRET" not in str(err.value)


@pytest.mark.usefixtures("prefect_harness")
def test_flows_on_s3_through_storage_options(s3_endpoint, demo_small):
    import s3fs

    X, y = demo_small[0][:360], demo_small[1][:360]
    url = "s3://archive/atomline-ws"
    ws = Workspace.open(url, create=True)  # options from the environment only
    assert type(ws.root.store.fs).__name__ == "S3FileSystem"
    ws.add_records("vib", X, chunk_rows=60)
    ws.add_labels("vib", y)

    secrets = [s3_endpoint["secret"], s3_endpoint["key"], s3_endpoint["client_kwargs"]["endpoint_url"]]
    seen: list[str] = []
    handler = logging.Handler(level=logging.DEBUG)
    handler.emit = lambda record: seen.append(record.getMessage())
    watched = [logging.getLogger(), logging.getLogger("prefect")]
    levels = [w.level for w in watched]
    for w in watched:
        w.addHandler(handler)
        w.setLevel(logging.INFO)
    try:
        trained = train_flow(url, "vib", train=TrainOptions(n_atoms=32, patch_size=64, stride=32,
                                                            sample_patches=3000, seed=1,
                                                            coder_options={"n_nonzero": 4}))
        dict_id = trained["dict_id"]
        encoded = encode_flow.with_options(task_runner=task_runner("threads", 2))(
            url, "vib", dict_id=dict_id, runner=RunnerOptions(workers=2))
        pooled = pool_flow.with_options(task_runner=task_runner("threads", 2))(
            url, "vib", dict_id=dict_id, pool=PoolOptions(regions=2), runner=RunnerOptions(workers=2))
        evaluation = evaluate_flow(url, "vib", dict_id=dict_id,
                                   evaluate=EvaluateOptions(learning_curve=[], n_boot=200))
    finally:
        for w, level in zip(watched, levels):
            w.removeHandler(handler)
            w.setLevel(level)
    assert encoded["encoded"] == pooled["pooled"] == 6
    assert evaluation["n_rows"] == 360

    # The same stages on an in-memory workspace give the same codes and features.
    reference = _reference_encode(X, y, ws.load_dictionary(dict_id), 60, 2)
    got = _arrays(Workspace.open(url), dict_id, "vib")
    for key, value in reference.items():
        np.testing.assert_array_equal(got[key], value, err_msg=key)

    # Credentials and endpoint are nowhere: not in any object, log line or flow parameter.
    fs = s3fs.S3FileSystem(**s3_endpoint, skip_instance_cache=True)
    objects = fs.find("archive")
    assert any("/codes/" in o for o in objects) and any("/evaluations/" in o for o in objects)
    blob = b"".join(fs.cat(objects).values())
    text = "\n".join(seen)
    assert "encode vib" in text  # the flows' own log lines were captured
    from prefect import get_client

    with get_client(sync_client=True) as client:
        params = json.dumps([r.parameters for r in client.read_flow_runs()])
    assert url in params
    for secret in secrets:
        assert secret.encode() not in blob
        assert secret not in text
        assert secret not in params


# ---------------------------------------------------------------------------- appending
def test_append_extends_fingerprint_history_and_labels(memory_url):
    rng = np.random.default_rng(5)
    X = rng.standard_normal((103, 6)).astype(np.float32)
    y = rng.integers(0, 3, 103)
    whole = Workspace.open(memory_url, create=True)
    whole.add_records("all", X, chunk_rows=10)
    ws = Workspace.open(memory_url + "-b", create=True)
    first = ws.add_records("r", X[:37], chunk_rows=10)
    ws.add_labels("r", y[:37])
    info = ws.append_records("r", X[37:80], labels=y[37:80])
    assert info["first_new_chunk"] == 3 and info["appended"] == 43
    info = ws.append_records("r", X[80:], labels=y[80:])
    np.testing.assert_array_equal(ws.records("r")[:], X)
    np.testing.assert_array_equal(ws.labels("r"), y)
    # The fingerprint follows the content: appending equals adding everything at once.
    assert info["fingerprint"] == whole.describe_records("all")["fingerprint"]
    assert [h["rows"] for h in ws.records_history("r")] == [37, 80, 103]
    assert ws.records_history("r")[0]["fingerprint"] == first["fingerprint"]

    with pytest.raises(InputError, match="labels"):
        ws.append_records("r", X[:2])  # labelled records need labels
    with pytest.raises(InputError, match="row shape"):
        ws.append_records("r", X[:2, :5], labels=y[:2])
    bad = X[:12].copy()
    bad[11, 0] = np.nan
    with pytest.raises(InputError, match="row 11"):
        ws.append_records("r", bad, labels=y[:12])
    # The refused append left nothing behind.
    assert ws.records("r").shape == (103, 6)
    assert ws.describe_records("r")["fingerprint"] == info["fingerprint"]


def test_append_stopped_half_way_is_refused_then_rolled_back(memory_url):
    X = np.arange(60, dtype=np.float32).reshape(20, 3)
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("r", X[:14], chunk_rows=4)
    # What a crash between the data and the attributes leaves: more rows than fingerprinted.
    z = ws.root["data/r"]
    z.resize((17, 3))
    z[14:17] = X[14:17]
    with pytest.raises(LayoutError, match="append stopped half-way"):
        ws.records("r")
    ws.append_records("r", X[14:])
    np.testing.assert_array_equal(ws.records("r")[:], X)
    assert [h["rows"] for h in ws.records_history("r")] == [14, 20]


def test_outputs_refuse_records_that_were_replaced(memory_url, demo_small):
    from atomline.stages import train
    from atomline.stages.errors import FingerprintMismatch

    X, y = demo_small
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("vib", X[:200], chunk_rows=50)
    dict_id = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=16, patch_size=64, stride=64, sample_patches=1000))["dict_id"]
    prepared = encode.prepare_encode(ws, "vib", dict_id)
    encode.encode_chunks(ws, "vib", dict_id, prepared["pending"])
    ws.add_records("vib", X[200:400], chunk_rows=50, overwrite=True)  # other rows, same name
    with pytest.raises(FingerprintMismatch, match="other inputs"):
        encode.prepare_encode(ws, "vib", dict_id)


@pytest.mark.usefixtures("prefect_harness")
def test_nightly_after_append_encodes_only_new_chunks(demo_small, memory_url):
    X, y = demo_small
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("vib", X[:430], chunk_rows=40)  # 10 full chunks and one of 30 rows
    ws.add_labels("vib", y[:430])
    runner = task_runner("threads", 2)
    first = nightly_flow.with_options(task_runner=runner)(memory_url, "vib", gate=GateOptions(retrain="if-missing"),
                                                          **NIGHTLY)
    assert first["outcome"] == "first" and first["encode"]["encoded"] == 11
    dict_id = first["promoted_id"]

    ws.append_records("vib", X[430:], labels=y[430:])  # 600 rows: chunks 10..14 change or are new
    again = nightly_flow.with_options(task_runner=runner)(memory_url, "vib", gate=GateOptions(retrain="if-missing"),
                                                          **NIGHTLY)
    assert again["outcome"] == "kept" and again["promoted_id"] == dict_id
    assert (again["encode"]["encoded"], again["encode"]["skipped"]) == (5, 10)
    assert (again["pool"]["pooled"], again["pool"]["skipped"]) == (5, 10)

    reference = _reference_encode(X, y, ws.load_dictionary(dict_id), 40, NIGHTLY["pool"].regions)
    got = _arrays(ws, dict_id, "vib")
    for key, value in reference.items():
        np.testing.assert_array_equal(got[key], value, err_msg=key)

    # Retraining: the new archive gives a new candidate, encoded whole into its own group;
    # the promoted features were already up to date, so nothing of them is redone.
    retrained = nightly_flow.with_options(task_runner=runner)(memory_url, "vib", gate=GateOptions(retrain="always"),
                                                              **NIGHTLY)
    assert retrained["candidate_id"] != dict_id
    assert retrained["encode"]["encoded"] == 15
    assert Workspace.open(memory_url).output(encode.codes_path(dict_id, "vib")).complete
    assert retrained["outcome"] in ("promoted", "inconclusive", "regression")


@pytest.mark.usefixtures("prefect_harness")
def test_retrain_never_needs_a_promoted_dictionary(memory_url):
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("r", np.ones((8, 64), np.float32))
    with pytest.raises(NotFound, match="retrain='never'"):
        nightly_flow(memory_url, "r", gate=GateOptions(retrain="never"))
    with pytest.raises(InputError, match="retrain"):
        nightly_flow(memory_url, "r", gate=GateOptions(retrain="sometimes"))


# ---------------------------------------------------------------------------- runners
@pytest.mark.usefixtures("prefect_harness")
def test_memory_workspace_refused_for_process_workers(memory_url):
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("r", np.ones((8, 64), np.float32))
    with pytest.raises(InputError, match="in-memory store"):
        encode_flow.with_options(task_runner=task_runner("processes", 2))(memory_url, "r", dict_id="x")


@pytest.mark.usefixtures("prefect_harness")
def test_failed_batch_is_retried_and_resumes_at_chunk_level(demo_small, memory_url, monkeypatch):
    from atomline.stages import train

    X, y = demo_small
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("vib", X[:240], chunk_rows=40)
    dict_id = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=16, patch_size=64, stride=64, sample_patches=1000))["dict_id"]
    real = encode.code
    calls = {"n": 0}

    def flaky(*args, **kwargs):  # the second chunk coded fails once, as a lost worker would
        calls["n"] += 1
        if calls["n"] == 2:
            raise ConnectionError("worker lost")
        return real(*args, **kwargs)

    monkeypatch.setattr(encode, "code", flaky)
    summary = encode_flow.with_options(task_runner=task_runner("threads", 1))(
        memory_url, "vib", dict_id=dict_id, runner=RunnerOptions(workers=1, batches_per_worker=1))
    # One batch of six chunks: chunk 0 was committed before the failure, so the retry
    # skips it and codes the other five; 6 coder calls + the failed one.
    assert summary["encoded"] == 5 and summary["skipped"] == 1
    assert calls["n"] == 7
    monkeypatch.setattr(encode, "code", real)
    reference = _reference_encode(X[:240], y[:240], ws.load_dictionary(dict_id), 40, 2)
    codes = ws.output(encode.codes_path(dict_id, "vib")).group
    for key in ("index", "value", "count"):
        np.testing.assert_array_equal(codes[key][:], reference[key], err_msg=key)


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
def test_nightly_on_dask_cluster_matches_threads(demo_small, tmp_path):
    pytest.importorskip("prefect_dask")
    X, y = demo_small
    threads_url, dask_url = str(tmp_path / "threads.zarr"), str(tmp_path / "dask.zarr")
    ws = Workspace.open(threads_url, create=True)
    ws.add_records("vib", X, chunk_rows=40)
    ws.add_labels("vib", y)
    shutil.copytree(threads_url, dask_url)

    by_threads = nightly_flow.with_options(task_runner=task_runner("threads", 2))(
        threads_url, "vib", **NIGHTLY)
    dask_dir = tmp_path / "dask-workers"
    dask_dir.mkdir()
    runner = task_runner("dask", 2, dask_options={"local_directory": str(dask_dir)})
    by_dask = nightly_flow.with_options(task_runner=runner)(dask_url, "vib", **NIGHTLY)

    assert by_dask["outcome"] == by_threads["outcome"] == "first"
    assert by_dask["candidate_id"] == by_threads["candidate_id"]
    assert by_dask["encode"]["encoded"] == 15
    assert by_dask["candidate"]["features"] == by_threads["candidate"]["features"]
    files_threads = _chunk_files(threads_url, ("dictionaries", "codes", "features"))
    files_dask = _chunk_files(dask_url, ("dictionaries", "codes", "features"))
    assert len(files_threads) > 30
    assert files_dask == files_threads
    assert any(dask_dir.iterdir())  # the local cluster's workers kept their scratch space there


def test_cli_append_records(tmp_path, capsys):
    from atomline.flows.cli import main

    rng = np.random.default_rng(9)
    X = rng.standard_normal((30, 8)).astype(np.float32)
    y = rng.integers(0, 2, 30)
    url = str(tmp_path / "ws.zarr")
    np.save(tmp_path / "old.npy", X[:20])
    np.save(tmp_path / "new.npy", X[20:])
    np.save(tmp_path / "old-labels.npy", y[:20])
    np.save(tmp_path / "new-labels.npy", y[20:])
    assert main(["add-records", url, "r", str(tmp_path / "old.npy"), "--chunk-rows", "8", "--json"]) == 0
    assert main(["add-labels", url, "r", str(tmp_path / "old-labels.npy"), "--json"]) == 0
    capsys.readouterr()
    assert main(["append-records", url, "r", str(tmp_path / "new.npy"), "--json"]) == 2  # labels missing
    assert "labels" in json.loads(capsys.readouterr().out)["message"]
    assert main(["append-records", url, "r", str(tmp_path / "new.npy"), "--labels",
                 str(tmp_path / "new-labels.npy"), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["shape"] == [30, 8] and report["first_new_chunk"] == 2
    ws = Workspace.open(url)
    np.testing.assert_array_equal(ws.records("r")[:], X)
    np.testing.assert_array_equal(ws.labels("r"), y)


def test_appended_zero_rows_are_stored_chunks(memory_url):
    # A chunk of zeros must be stored like any other: the workspace treats a missing chunk
    # object as a lost chunk.
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("r", np.ones((10, 4), np.float32), chunk_rows=5)
    ws.append_records("r", np.zeros((10, 4), np.float32))
    for chunk in range(4):
        assert ws.read_chunk("r", chunk).shape == (5, 4)
