"""Store faults: failed writes, missing and corrupt input chunks, zero and constant records."""

from __future__ import annotations

import warnings
import errno
import os
import shutil

import numpy as np
import pytest
import zarr
from conftest import store_snapshot
from zarr.storage import LocalStore

from atomline.stages import encode, evaluate, pool, train
from atomline.stages.errors import BadChunk, StoreFault
from atomline.stages.workspace import Workspace
from atomline.stages.options import EncodeOptions, EvaluateOptions, PoolOptions, TrainOptions

TRAIN = dict(n_atoms=16, patch_size=128, stride=128, sample_patches=1000, seed=0,
             coder_options={"n_nonzero": 3})


class _FullDisk(LocalStore):
    """A local store whose writes of chosen keys fail as on a full disk."""

    failing: tuple[str, ...] = ()

    async def set(self, key, value, byte_range=None):
        if any(key.startswith(prefix) for prefix in self.failing):
            raise OSError(errno.ENOSPC, "No space left on device", key)
        return await super().set(key, value)


def _open_with(store_cls, url: str, failing: tuple[str, ...]) -> Workspace:
    store = store_cls(url)
    store.failing = failing
    return Workspace(zarr.open_group(store=store, mode="r+"), url)


@pytest.fixture(scope="module")
def prepared(tmp_path_factory, demo_small):
    X, y = demo_small
    url = str(tmp_path_factory.mktemp("faults") / "ws.zarr")
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X[:160], chunk_rows=20)
    ws.add_labels("vib", y[:160])
    dict_id = train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))["dict_id"]
    reference = str(tmp_path_factory.mktemp("faults-ref") / "ws.zarr")
    shutil.copytree(url, reference)
    p = encode.prepare_encode(reference, "vib", dict_id)
    encode.encode_chunks(reference, "vib", dict_id, p["pending"])
    return url, reference, dict_id


def _copy(url, tmp_path) -> str:
    target = str(tmp_path / "ws.zarr")
    shutil.copytree(url, target)
    return target


def _codes(url, dict_id):
    path = encode.codes_path(dict_id, "vib")
    return {k: v for k, v in store_snapshot(Workspace.open(url)).items()
            if k.startswith(path + "/") and "/c/" in k}


@pytest.mark.parametrize("failing_array", ["value", "done"])
def test_failed_write_leaves_no_chunk_marked_done(prepared, tmp_path, failing_array):
    url0, reference, dict_id = prepared
    url = _copy(url0, tmp_path)
    p = encode.prepare_encode(url, "vib", dict_id)
    encode.encode_chunks(url, "vib", dict_id, p["pending"][:3])
    # The disk fills up: writes of chunk 3 of the value (or done) array fail from now on.
    prefix = f"codes/{dict_id}/vib/{failing_array}/c/3"
    ws = _open_with(_FullDisk, url, (prefix,))
    with pytest.raises(StoreFault, match=r"chunk 3 .*No space left") as caught:
        encode.encode_chunks(ws, "vib", dict_id, p["pending"])
    assert "not marked done" in str(caught.value)
    flags = Workspace.open(url).output(encode.codes_path(dict_id, "vib")).done_flags()
    np.testing.assert_array_equal(flags, [True, True, True] + [False] * (flags.size - 3))
    # Space is freed: the rerun writes chunk 3 again and ends with the reference bytes.
    again = encode.encode_chunks(url, "vib", dict_id, p["pending"])
    assert again["skipped"] == 3
    assert _codes(url, dict_id) == _codes(reference, dict_id)


def _damage(url, dict_id, chunk, how):
    path = os.path.join(url, "data", "vib", "c", str(chunk), "0")
    if how == "missing":
        os.remove(path)
    else:
        with open(path, "r+b") as fh:
            fh.seek(4)
            fh.write(b"\xff" * 16)


@pytest.mark.parametrize("how", ["missing", "corrupt"])
def test_bad_input_chunk_stops_with_its_coordinates(prepared, tmp_path, how):
    url0, _, dict_id = prepared
    url = _copy(url0, tmp_path)
    _damage(url, dict_id, 5, how)
    p = encode.prepare_encode(url, "vib", dict_id)
    with pytest.raises(BadChunk, match=r"records 'vib', chunk 5 \(rows 100\.\.119\)"):
        encode.encode_chunks(url, "vib", dict_id, p["pending"])
    out = Workspace.open(url).output(encode.codes_path(dict_id, "vib"))
    assert out.pending()[0] == 5 and not out.is_done(5)


@pytest.mark.parametrize("how", ["missing", "corrupt"])
def test_bad_input_chunk_skipped_and_recorded(prepared, tmp_path, how):
    url0, reference, dict_id = prepared
    url = _copy(url0, tmp_path)
    _damage(url, dict_id, 5, how)
    p = encode.prepare_encode(url, "vib", dict_id)
    result = encode.encode_chunks(url, "vib", dict_id, p["pending"], options=EncodeOptions(on_bad_chunk="skip"))
    assert result["bad"] == 1 and result["encoded"] == p["n_chunks"] - 1
    again = encode.prepare_encode(url, "vib", dict_id)  # lists the skipped rows
    assert again["pending"] == [] and again["skipped_rows"] == 20
    ws = Workspace.open(url)
    codes = ws.output(encode.codes_path(dict_id, "vib"))
    assert codes.attrs["skipped"] == {"chunks": [5], "rows": [[100, 120]], "n_rows": 20}
    # The skipped chunk holds fill values only; every other chunk equals the reference.
    P = codes.attrs["patches_per_record"]
    assert (codes.group["count"][100 * P : 120 * P] == 0).all()
    assert (codes.group["index"][100 * P : 120 * P] == -1).all()
    ref = Workspace.open(reference).output(encode.codes_path(dict_id, "vib")).group
    keep = np.r_[0 : 100 * P, 120 * P : 160 * P]
    np.testing.assert_array_equal(codes.group["value"][:][keep], ref["value"][:][keep])
    # Pooling carries the skip over; the evaluation says how many rows it lacked.
    pp = pool.prepare_pool(ws, "vib", dict_id, options=PoolOptions(regions=2))
    pool.pool_chunks(ws, "vib", dict_id, pp["pending"])
    assert pool.prepare_pool(ws, "vib", dict_id, options=PoolOptions(regions=2))["skipped_rows"] == 20
    feats = ws.output(pool.features_path(dict_id, "vib"))
    assert feats.skipped_chunks() == [5] and (feats.group["values"][100:120] == 0).all()
    report = evaluate.evaluate_features(ws, "vib", dict_id)
    assert report["rows_lacking"] == 20
    assert report["n_rows"] == 140
    assert ws.evaluation(report["run_id"])["rows_lacking"] == 20


def test_torn_done_flag_counts_as_to_do(prepared, tmp_path):
    url0, reference, dict_id = prepared
    url = _copy(url0, tmp_path)
    p = encode.prepare_encode(url, "vib", dict_id)
    encode.encode_chunks(url, "vib", dict_id, p["pending"])
    flag = os.path.join(url, "codes", dict_id, "vib", "done", "c", "2")
    with open(flag, "wb") as fh:
        fh.write(b"\x28\xb5")  # the first bytes of a zstd frame, then nothing
    out = Workspace.open(url).output(encode.codes_path(dict_id, "vib"))
    assert out.pending() == [2]
    redo = encode.encode_chunks(url, "vib", dict_id, p["pending"])
    assert redo["encoded"] == 1
    assert _codes(url, dict_id) == _codes(reference, dict_id)


@pytest.mark.parametrize("scale", [1e-20, 1.0, 1e15])
def test_zero_and_constant_records_give_finite_codes(memory_url, demo_small, scale):
    """Stage-level robustness: zero rows, constant rows and extreme float32 scales."""
    X, _ = demo_small
    ws = Workspace.open(memory_url, create=True)
    records = (X[:64] * np.float32(scale)).astype(np.float32)
    records[3] = 0.0
    records[10] = np.float32(2.5 * scale)
    records[20:24] = 0.0
    ws.add_records("vib", records, chunk_rows=16)
    dict_id = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=16, patch_size=128, stride=128, sample_patches=800, seed=0, coder_options={"n_nonzero": 3}))["dict_id"]
    p = encode.prepare_encode(ws, "vib", dict_id)
    encode.encode_chunks(ws, "vib", dict_id, p["pending"])
    codes = ws.output(encode.codes_path(dict_id, "vib")).group
    value, count = codes["value"][:], codes["count"][:]
    assert np.isfinite(value).all()
    assert (count <= 3).all()
    pp = pool.prepare_pool(ws, "vib", dict_id, options=PoolOptions(regions=2))
    pool.pool_chunks(ws, "vib", dict_id, pp["pending"])
    assert np.isfinite(ws.output(pool.features_path(dict_id, "vib")).group["values"][:]).all()


# ------------------------------------------------------------ corrupt intermediate outputs

def _truncate(path: str) -> None:
    with open(path, "r+b") as fh:
        fh.truncate(max(1, os.path.getsize(path) // 2))


@pytest.fixture
def pooled(prepared, tmp_path):
    """A private workspace with the codes of every chunk (from the reference) pooled."""
    _, reference, dict_id = prepared
    url = _copy(reference, tmp_path)
    pp = pool.prepare_pool(url, "vib", dict_id, options=PoolOptions(regions=2))
    pool.pool_chunks(url, "vib", dict_id, pp["pending"])
    return url, dict_id


@pytest.mark.parametrize("array", ["index", "value"])
def test_truncated_codes_chunk_stops_pool_naming_array_and_chunk(pooled, array):
    url, dict_id = pooled
    _truncate(os.path.join(url, "codes", dict_id, "vib", array, "c", "3", "0"))
    pp = pool.prepare_pool(url, "vib", dict_id, overwrite=True, options=PoolOptions(regions=2))
    with pytest.raises(BadChunk) as caught:
        pool.pool_chunks(url, "vib", dict_id, pp["pending"])
    message = str(caught.value)
    assert f"codes/{dict_id}/vib/{array}, chunk 3 " in message and "--on-bad-chunk skip" in message
    assert Workspace.open(url).output(pool.features_path(dict_id, "vib")).pending() == [3, 4, 5, 6, 7]


def test_truncated_codes_chunk_skipped_by_pool_and_left_out_by_evaluate(pooled):
    url, dict_id = pooled
    _truncate(os.path.join(url, "codes", dict_id, "vib", "value", "c", "3", "0"))
    pp = pool.prepare_pool(url, "vib", dict_id, overwrite=True, options=PoolOptions(regions=2))
    result = pool.pool_chunks(url, "vib", dict_id, pp["pending"], options=PoolOptions(on_bad_chunk="skip"))
    assert result["bad"] == 1 and result["pooled"] == 7
    again = pool.prepare_pool(url, "vib", dict_id, options=PoolOptions(regions=2))
    assert again["pending"] == [] and again["skipped_rows"] == 20
    report = evaluate.evaluate_features(url, "vib", dict_id, options=EvaluateOptions(baselines=(), learning_curve=()))
    assert report["rows_lacking"] == 20 and report["n_rows"] == 140


def test_corrupt_features_chunk_named_by_evaluate_or_left_out(pooled):
    url, dict_id = pooled
    _truncate(os.path.join(url, "features", dict_id, "vib", "values", "c", "2", "0"))
    options = dict(baselines=(), learning_curve=())
    with pytest.raises(BadChunk, match=rf"features/{dict_id}/vib/values, chunk 2 \(rows 40\.\.59\)"):
        evaluate.evaluate_features(url, "vib", dict_id, EvaluateOptions(**options))
    report = evaluate.evaluate_features(url, "vib", dict_id, EvaluateOptions(**options, on_bad_chunk="skip"))
    assert report["rows_lacking"] == 20 and report["n_rows"] == 140


def test_only_transient_failures_are_worth_retrying():
    from atomline.stages.errors import LeaseLost, worth_retrying

    assert worth_retrying(RuntimeError("worker lost its connection"))
    assert worth_retrying(StoreFault("throttled"))  # a store failing while writing
    assert not worth_retrying(BadChunk("chunk 5"))
    assert not worth_retrying(LeaseLost("taken"))


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
def test_bad_input_chunk_is_not_retried_by_the_flow(prepared, tmp_path, monkeypatch):
    from atomline.flows import encode_flow
    from atomline.stages.options import RunnerOptions

    url0, _, dict_id = prepared
    url = _copy(url0, tmp_path)
    _damage(url, dict_id, 5, "corrupt")
    reads = []
    real_read = Workspace.read_chunk

    def counting(self, name, chunk, arr=None):
        reads.append(chunk)
        return real_read(self, name, chunk, arr)

    monkeypatch.setattr(Workspace, "read_chunk", counting)
    with pytest.raises(BadChunk, match="chunk 5"):
        encode_flow(url, "vib", dict_id=dict_id, runner=RunnerOptions(workers=1, batches_per_worker=1))
    assert reads.count(5) == 1  # deterministic: one attempt, not three


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
def test_cli_pool_and_evaluate_take_the_bad_chunk_choice(pooled, capsys):
    import json

    from atomline.flows import cli

    url, dict_id = pooled
    _truncate(os.path.join(url, "codes", dict_id, "vib", "value", "c", "3", "0"))
    base = ["pool", url, "vib", "--dictionary", dict_id, "--regions", "2", "--overwrite", "--workers", "1",
            "--json"]
    assert cli.main(base) != 0
    assert f"codes/{dict_id}/vib/value, chunk 3" in capsys.readouterr().out
    assert cli.main(base + ["--on-bad-chunk", "skip"]) == 0
    assert json.loads(capsys.readouterr().out)["skipped_rows"] == 20
    _truncate(os.path.join(url, "features", dict_id, "vib", "values", "c", "1", "0"))
    assert cli.main(["evaluate", url, "vib", "--dictionary", dict_id, "--baselines", "--curve",
                     "--no-pictures", "--json", "--on-bad-chunk", "skip"]) == 0
    assert json.loads(capsys.readouterr().out)["rows_lacking"] == 40


# ------------------------------------------------------------ a read-only workspace

@pytest.fixture
def read_only(prepared, tmp_path, monkeypatch):
    """A copy of the workspace on what behaves like a read-only mount: every file write
    fails with EROFS (as root, permissions alone would not stop the writes)."""
    import zarr.storage._local as local

    url = _copy(prepared[0], tmp_path)

    def refuse(path, value, exclusive=False):
        raise OSError(errno.EROFS, "Read-only file system", str(path))

    monkeypatch.setattr(local, "_put", refuse)
    return url, prepared[2]


def test_read_only_workspace_is_named_as_such_by_leases(read_only):
    from atomline.stages.errors import NotWritable

    url, dict_id = read_only
    ws = Workspace.open(url)
    before = store_snapshot(ws)
    with pytest.raises(NotWritable, match="read-only") as caught:
        ws.lease(encode.codes_path(dict_id, "vib"))
    assert "taking it in turn" not in str(caught.value)
    with pytest.raises(NotWritable, match="read-only"):
        encode.prepare_encode(ws, "vib", dict_id)  # the stage, not only the lease
    assert store_snapshot(ws) == before


def test_read_only_workspace_refuses_add_records_without_a_raw_os_error(read_only, tmp_path, capsys):
    import json

    from atomline.flows import cli
    from atomline.stages.errors import NotWritable

    url, _ = read_only
    with pytest.raises(NotWritable, match="read-only"):
        Workspace.open(url).add_records("new", np.ones((4, 8), np.float32))
    npy = tmp_path / "new.npy"
    np.save(npy, np.ones((4, 8), np.float32))
    assert cli.main(["add-records", url, "new", str(npy), "--json"]) != 0
    refusal = json.loads(capsys.readouterr().out)
    assert refusal["error"] == "NotWritable" and "read-only" in refusal["message"]


def test_lease_on_a_read_only_object_store_is_named_as_such(memory_url):
    from atomline.stages.errors import NotWritable

    ws = Workspace.open(memory_url, create=True)

    async def refuse(path, data, **kwargs):
        raise PermissionError(errno.EACCES, "Access Denied", path)

    ws.root.store.fs._pipe_file = refuse  # s3fs raises PermissionError for AccessDenied
    with pytest.raises(NotWritable, match="read-only"):
        ws.lease("promoted")


def test_unfinished_writes_left_by_a_kill_are_hidden_then_swept_by_the_next_writer(tmp_path):
    # zarr's local store writes <key>.<uuid hex>.partial, then renames it; a SIGKILL in
    # between leaves the temporary file, which group listings showed as an unknown member
    # (ZarrUserWarning, seen after the training kill test).
    url = tmp_path / "ws.zarr"
    ws = Workspace.open(str(url), create=True)
    ws.add_records("vib", np.zeros((4, 8), np.float32), chunk_rows=2)
    in_group = url / "codes" / f"zarr.json.{'a' * 32}.partial"
    at_root = url / f"zarr.json.{'b' * 32}.partial"
    for path in (in_group, at_root):
        path.write_bytes(b"{")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        names = [name for name, _ in Workspace.open(str(url)).root.members(max_depth=None)]
    assert "data/vib" in names and not any(".partial" in name for name in names)

    output = url / "codes" / "d-x" / "vib" / "value" / "c" / "3"
    output.mkdir(parents=True)
    in_output = output / f"0.{'c' * 32}.partial"
    kept = output / "notes.partial"  # not zarr's naming: not ours to remove
    for path in (in_output, kept):
        path.write_bytes(b"{")
    with Workspace.open(str(url)).lease("codes/d-x/vib"):
        assert not in_output.exists() and kept.exists()
        assert in_group.exists() and at_root.exists()  # outside this output: left alone
    with Workspace.open(str(url)).lease("promoted"):
        assert not at_root.exists() and in_group.exists()
