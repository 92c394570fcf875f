"""Write leases: one run per output; dead runs' leases expire or are broken; data is kept."""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import time

import numpy as np
import pytest
from conftest import store_snapshot

from atomline.stages import encode, train
from atomline.stages._leases import LeaseInfo, _LeaseStore
from atomline.stages.errors import LeaseHeld
from atomline.stages.workspace import Workspace

TRAIN = dict(n_atoms=16, patch_size=128, stride=128, sample_patches=1000, seed=0,
             coder_options={"n_nonzero": 3})


def _plant(ws: Workspace, output: str, *, host: str, pid: int, age: float, ttl: float = 60.0,
           run: str = "planted run") -> None:
    """Write a lease as another run would have left it."""
    now = time.time()
    info = LeaseInfo(output, host, pid, run, "planted-token", now - age - 5, now - age, ttl)
    _LeaseStore(ws.root.store, ws.root.store_path.path).overwrite(info)


def _dead_pid() -> int:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


@pytest.fixture(params=["local", "fsspec-memory", "s3"])
def ws(request, tmp_path, memory_url):
    # s3: s3fs against a local S3-compatible server (moto), where the lease is created
    # with a conditional PUT (If-None-Match: *).
    url = {"local": str(tmp_path / "ws.zarr"), "fsspec-memory": memory_url,
           "s3": "s3://archive/leases-ws"}[request.param]
    if request.param == "s3":
        request.getfixturevalue("s3_endpoint")
    w = Workspace.open(url, create=True)
    w.add_records("r", np.ones((8, 4), np.float32), chunk_rows=2)
    return w


def test_second_writer_refused_with_holder_named(ws):
    path = "codes/d-x/r"
    with ws.lease(path, run="nightly-owl") as held:
        with pytest.raises(LeaseHeld) as caught:
            ws.lease(path, run="nightly-lark")
        message = str(caught.value)
        assert "nightly-owl" in message and socket.gethostname() in message
        assert f"pid {os.getpid()}" in message and "started 20" in message  # an ISO date
        assert "--break-lease" in message
        holder = ws.lease_holder(path)
        assert holder["token"] == held.info.token and holder["expired"] is False
        # Writing the output outside the lease is refused too (another run's view).
        from atomline.stages import workspace as wsmod

        wsmod._HELD_LEASES.discard(held.info.token)
        with pytest.raises(LeaseHeld, match="nightly-owl"):
            ws.create_output(path, n_rows=4, chunk_rows=2, arrays={"v": ((), "f4")},
                             attrs={"fingerprint": "f"})
        wsmod._HELD_LEASES.add(held.info.token)
    assert ws.lease_holder(path) is None  # released on exit
    with ws.lease(path, run="nightly-lark"):
        pass


def test_lease_of_a_dead_process_on_this_host_is_taken_over(ws):
    path = "codes/d-x/r"
    _plant(ws, path, host=socket.gethostname(), pid=_dead_pid(), age=0)
    with ws.lease(path, run="rerun") as held:
        assert ws.lease_holder(path)["run"] == "rerun" and held.info.pid == os.getpid()


def test_lease_from_another_host_expires_after_its_ttl(ws):
    path = "features/d-x/r"
    _plant(ws, path, host="elsewhere", pid=1, age=1.0, ttl=600)
    with pytest.raises(LeaseHeld, match="host elsewhere"):
        ws.lease(path)  # live: heartbeat 1 s old, TTL 10 min
    _plant(ws, path, host="elsewhere", pid=1, age=700, ttl=600)
    assert ws.lease_holder(path)["expired"] is True
    with ws.lease(path, run="after expiry"):
        assert ws.lease_holder(path)["run"] == "after expiry"


def test_heartbeat_keeps_a_short_lease_alive(ws):
    path = "dictionaries/d-y"
    with ws.lease(path, run="slow", ttl=0.4) as held:
        started = held.info.started
        time.sleep(1.2)  # three TTLs: without the heartbeat it would have expired
        holder = ws.lease_holder(path)
        assert holder["heartbeat"] > started + 0.5 and holder["expired"] is False
        with pytest.raises(LeaseHeld):
            ws.lease(path)
    assert not held.lost


def test_explicit_break_keeps_finished_chunks(tmp_path, demo_small):
    X, y = demo_small
    ws = Workspace.open(str(tmp_path / "ws.zarr"), create=True)
    ws.add_records("vib", X[:120], chunk_rows=20)
    dict_id = train.train_dictionary(ws, "vib", **TRAIN)["dict_id"]
    path = encode.codes_path(dict_id, "vib")
    first = encode.prepare_encode(ws, "vib", dict_id)
    encode.encode_chunks(ws, "vib", dict_id, first["pending"][:2])
    # A run on another host died holding the lease; its heartbeat is still fresh.
    _plant(ws, path, host="elsewhere", pid=1, age=0, ttl=3600, run="dead nightly")
    before = store_snapshot(ws)
    with pytest.raises(LeaseHeld, match="dead nightly"):
        encode.prepare_encode(ws, "vib", dict_id)
    assert store_snapshot(ws) == before
    broken = ws.break_lease(path)
    assert broken["run"] == "dead nightly"
    with ws.lease(path, run="rescue"):
        again = encode.prepare_encode(ws, "vib", dict_id)
        assert again["pending"] == first["pending"][2:]
        result = encode.encode_chunks(ws, "vib", dict_id, first["pending"])
    assert result["skipped"] == 2 and result["encoded"] == len(first["pending"]) - 2
    # break_existing=True does the same in one step.
    _plant(ws, path, host="elsewhere", pid=1, age=0, ttl=3600)
    with ws.lease(path, break_existing=True, run="forced"):
        assert ws.lease_holder(path)["run"] == "forced"


def test_unreadable_lease_object_counts_as_expired(tmp_path):
    ws = Workspace.open(str(tmp_path / "ws.zarr"), create=True)
    target = tmp_path / "ws.zarr" / ".leases" / "promoted.json"
    target.parent.mkdir(parents=True)
    target.write_text("{torn")
    with ws.lease("promoted", run="after a torn write"):
        assert json.loads(target.read_text())["run"] == "after a torn write"


# ------------------------------------------------------------ two runs, one output (CLI)

def _cli_env() -> dict:
    from prefect.settings import PREFECT_API_URL

    return dict(os.environ, PREFECT_API_URL=PREFECT_API_URL.value())


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
def test_two_concurrent_runs_one_refused_data_intact(tmp_path, demo_small, capsys):
    from atomline.flows import cli

    X, _ = demo_small
    url = str(tmp_path / "ws.zarr")
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X, chunk_rows=2)  # 300 chunks: long enough to overlap a second run
    dict_id = train.train_dictionary(ws, "vib", n_atoms=32, patch_size=128, stride=64,
                                     sample_patches=2000, seed=2)["dict_id"]
    ws.promote(dict_id)
    ref_url = str(tmp_path / "reference.zarr")
    shutil.copytree(url, ref_url)
    prepared = encode.prepare_encode(ref_url, "vib", dict_id)
    encode.encode_chunks(ref_url, "vib", dict_id, prepared["pending"])

    path = encode.codes_path(dict_id, "vib")
    cmd = [sys.executable, "-m", "atomline.flows.cli", "encode", url, "vib", "--workers", "1", "--json"]
    first = subprocess.Popen(cmd, env=_cli_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while ws.lease_holder(path) is None and first.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    assert ws.lease_holder(path) is not None, first.stderr.read()[-2000:]
    # The second run starts while the first holds the lease: refused, naming the first.
    status = cli.main(["encode", url, "vib", "--workers", "1", "--json"])
    refusal = json.loads(capsys.readouterr().out)
    assert first.poll() is None, "the first run ended before the second started"
    assert status == 2 and refusal["error"] == "LeaseHeld"
    assert f"pid {first.pid}" in refusal["message"] and "atomline-encode/" in refusal["message"]
    out, err = first.communicate(timeout=300)
    assert first.returncode == 0, err[-3000:]
    assert json.loads(out)["encoded"] == prepared["n_chunks"]
    assert ws.lease_holder(path) is None
    codes = {k: v for k, v in store_snapshot(Workspace.open(url)).items() if k.startswith(path + "/")}
    ref = {k: v for k, v in store_snapshot(Workspace.open(ref_url)).items() if k.startswith(path + "/")}
    assert codes.keys() == ref.keys()
    assert {k: v for k, v in codes.items() if "/c/" in k} == {k: v for k, v in ref.items() if "/c/" in k}


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
def test_cli_break_lease_flag(tmp_path, demo_small, capsys):
    from atomline.flows import cli

    X, _ = demo_small
    url = str(tmp_path / "ws.zarr")
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X[:80], chunk_rows=20)
    dict_id = train.train_dictionary(ws, "vib", **TRAIN)["dict_id"]
    ws.promote(dict_id)
    path = encode.codes_path(dict_id, "vib")
    _plant(ws, path, host="elsewhere", pid=1, age=0, ttl=3600, run="stuck run")
    assert cli.main(["encode", url, "vib", "--workers", "1", "--json"]) == 2
    assert "stuck run" in json.loads(capsys.readouterr().out)["message"]
    assert cli.main(["encode", url, "vib", "--workers", "1", "--json", "--break-lease"]) == 0
    assert json.loads(capsys.readouterr().out)["encoded"] == 4
    assert ws.lease_holder(path) is None
