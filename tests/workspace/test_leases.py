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
from atomline.stages.workspace.leases import LeaseInfo, _LeaseStore
from atomline.stages.errors import LeaseHeld
from atomline.stages.workspace import Workspace
from atomline.stages.options import TrainOptions

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
    dict_id = train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))["dict_id"]
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
    dict_id = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=32, patch_size=128, stride=64, sample_patches=2000, seed=2))["dict_id"]
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
    dict_id = train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))["dict_id"]
    ws.promote(dict_id)
    path = encode.codes_path(dict_id, "vib")
    _plant(ws, path, host="elsewhere", pid=1, age=0, ttl=3600, run="stuck run")
    assert cli.main(["encode", url, "vib", "--workers", "1", "--json"]) == 2
    assert "stuck run" in json.loads(capsys.readouterr().out)["message"]
    assert cli.main(["encode", url, "vib", "--workers", "1", "--json", "--break-lease"]) == 0
    assert json.loads(capsys.readouterr().out)["encoded"] == 4
    assert ws.lease_holder(path) is None


# ------------------------------------------------------------ a writer that lost its lease

def test_lease_records_the_holder_process_start_so_a_reused_pid_counts_as_dead(ws):
    from atomline.stages.workspace.leases import process_start

    path = "codes/d-x/r"
    me, started = os.getpid(), process_start(os.getpid())
    assert started is not None  # Linux: /proc/<pid>/stat field 22
    # This process is alive: a lease naming it with its own start time is live ...
    info = LeaseInfo(path, socket.gethostname(), me, "alive", "t-1", time.time(), time.time(), 600.0, started)
    _LeaseStore(ws.root.store, ws.root.store_path.path).overwrite(info)
    with pytest.raises(LeaseHeld, match="alive"):
        ws.lease(path)
    # ... but one naming the same PID with another start time was left by an earlier
    # process whose PID the system gave to this one: dead, taken over at once.
    reused = LeaseInfo(path, socket.gethostname(), me, "earlier", "t-2", time.time(), time.time(), 600.0,
                       started - 1)
    _LeaseStore(ws.root.store, ws.root.store_path.path).overwrite(reused)
    assert ws.lease_holder(path)["expired"] is True
    with ws.lease(path, run="rerun") as held:
        assert held.info.pid_start == started


def _encode_ready(ws_url: str, X, rows: int = 80, chunk_rows: int = 10):
    ws = Workspace.open(ws_url, create=True)
    ws.add_records("vib", X[:rows], chunk_rows=chunk_rows)
    dict_id = train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))["dict_id"]
    prepared = encode.prepare_encode(ws, "vib", dict_id)
    return ws, dict_id, prepared


def _codes_bytes(ws: Workspace, path: str) -> dict:
    return {k: v for k, v in store_snapshot(ws).items() if k.startswith(path + "/")}


def test_commit_refused_once_the_lease_is_taken_by_another_run(tmp_path, demo_small):
    from atomline.stages.errors import LeaseLost

    X, _ = demo_small
    ws, dict_id, prepared = _encode_ready(str(tmp_path / "ws.zarr"), X)
    path = encode.codes_path(dict_id, "vib")
    with ws.lease(path, run="first", ttl=600) as held:
        encode.encode_chunks(ws, "vib", dict_id, prepared["pending"][:1], lease=held.info.token)
        # Another run breaks the lease and takes it (as --break-lease would).
        _plant(ws, path, host="elsewhere", pid=1, age=0, ttl=600, run="second run")
        before = _codes_bytes(ws, path)
        with pytest.raises(LeaseLost, match="second run") as caught:
            encode.encode_chunks(ws, "vib", dict_id, prepared["pending"][1:], lease=held.info.token)
        assert "nothing more was committed" in str(caught.value)
        assert _codes_bytes(ws, path) == before
        assert not held.renew() and held.lost  # the heartbeat leaves the other run's lease alone
        assert ws.lease_holder(path)["run"] == "second run"
    assert ws.lease_holder(path)["run"] == "second run"  # not deleted on exit either


def test_own_lease_past_its_ttl_counts_as_lost(tmp_path, demo_small, monkeypatch):
    from atomline.stages.workspace import leases as _leases
    from atomline.stages.errors import LeaseLost

    X, _ = demo_small
    ws, dict_id, prepared = _encode_ready(str(tmp_path / "ws.zarr"), X)
    path = encode.codes_path(dict_id, "vib")
    with ws.lease(path, run="first", ttl=60) as held:
        stored = ws.lease_holder(path)
        before = _codes_bytes(ws, path)
        # An injected clock: the run was paused for two minutes, nobody took the lease yet.
        later = time.time() + 120
        monkeypatch.setattr(_leases.time, "time", lambda: later)
        with pytest.raises(LeaseLost, match="past the TTL"):
            encode.encode_chunks(ws, "vib", dict_id, prepared["pending"], lease=held.info.token)
        assert _codes_bytes(ws, path) == before
        assert not held.renew()  # an expired lease is not renewed ...
        assert ws.lease_holder(path)["heartbeat"] == stored["heartbeat"]  # ... nor rewritten
        monkeypatch.undo()


_PAUSED_WRITER = """
import sys
from atomline.stages import encode
from atomline.stages.workspace import Workspace

url, dict_id, ttl = sys.argv[1], sys.argv[2], float(sys.argv[3])
chunks = [int(c) for c in sys.argv[4].split(",")]
ws = Workspace.open(url)
# The first chunk before the lease: loading the compiled kernels can hold the GIL for
# longer than the short TTL, and the heartbeat thread needs it.
sys.stdin.readline()
encode.encode_chunks(ws, "vib", dict_id, chunks[:1])
print("committed", chunks[0], flush=True)
with ws.lease(encode.codes_path(dict_id, "vib"), run="paused writer", ttl=ttl) as held:
    for c in chunks[1:]:
        sys.stdin.readline()  # one chunk per line the test sends
        encode.encode_chunks(ws, "vib", dict_id, [c], lease=held.info.token)
        print("committed", c, flush=True)
"""


@pytest.mark.slow
def test_writer_paused_past_its_ttl_commits_nothing_after_another_run_took_the_lease(tmp_path, demo_small):
    import signal

    X, _ = demo_small
    url = str(tmp_path / "ws.zarr")
    ws, dict_id, prepared = _encode_ready(url, X)
    path = encode.codes_path(dict_id, "vib")
    ttl = 5.0
    writer = subprocess.Popen([sys.executable, "-c", _PAUSED_WRITER, url, dict_id, str(ttl),
                               ",".join(map(str, prepared["pending"]))],
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        for c in prepared["pending"][:2]:
            writer.stdin.write("go\n")
            writer.stdin.flush()
            assert writer.stdout.readline().split() == ["committed", str(c)], writer.stderr.read()[-2000:]
        writer.send_signal(signal.SIGSTOP)  # a suspended laptop, a stopped container
        time.sleep(ttl + 1.0)
        with ws.lease(path, run="second run") as second:  # the first's lease has expired
            before = _codes_bytes(ws, path)
            writer.send_signal(signal.SIGCONT)
            writer.stdin.write("go\n" * len(prepared["pending"]))
            writer.stdin.flush()
            out, err = writer.communicate(timeout=120)
            assert writer.returncode != 0 and "committed" not in out
            assert "LeaseLost" in err and "second run" in err and "nothing more was committed" in err
            assert _codes_bytes(ws, path) == before  # not one chunk written after the loss
            assert ws.lease_holder(path)["token"] == second.info.token
        assert ws.output(path).pending() == prepared["pending"][2:]
    finally:
        if writer.poll() is None:
            writer.send_signal(signal.SIGCONT)
            writer.kill()


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
def test_encode_flow_stops_at_once_when_its_lease_is_taken(tmp_path, demo_small, monkeypatch):
    from atomline.flows import encode_flow
    from atomline.stages.errors import LeaseLost
    from atomline.stages.options import RunnerOptions

    X, _ = demo_small
    url = str(tmp_path / "ws.zarr")
    ws, dict_id, prepared = _encode_ready(url, X)
    path = encode.codes_path(dict_id, "vib")
    real_code, calls = encode.code, []

    def code_while_another_run_takes_the_lease(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:  # while chunk 1 is being coded, another run takes the lease
            _plant(ws, path, host="elsewhere", pid=1, age=0, ttl=600, run="second run")
        return real_code(*args, **kwargs)

    monkeypatch.setattr(encode, "code", code_while_another_run_takes_the_lease)
    # LeaseLost (not LeaseHeld): the flow handed its token to the task, which checked it.
    with pytest.raises(LeaseLost, match="second run"):
        encode_flow(url, "vib", dict_id=dict_id, runner=RunnerOptions(workers=1, batches_per_worker=1))
    assert len(calls) == 2  # a lost lease is not retried
    assert Workspace.open(url).output(path).pending() == prepared["pending"][1:]
    assert ws.lease_holder(path)["run"] == "second run"


def test_training_that_lost_its_lease_stores_no_dictionary(tmp_path, demo_small, monkeypatch):
    from atomline.stages.errors import LeaseLost

    X, _ = demo_small
    ws = Workspace.open(str(tmp_path / "ws.zarr"), create=True)
    ws.add_records("vib", X[:80], chunk_rows=20)
    real_learn = train.learn

    def learn_while_another_run_takes_the_lease(*args, **kwargs):
        learned = real_learn(*args, **kwargs)
        (lease_path,) = _held_dictionary_leases(ws)
        _plant(ws, lease_path, host="elsewhere", pid=1, age=0, ttl=600, run="second trainer")
        return learned

    monkeypatch.setattr(train, "learn", learn_while_another_run_takes_the_lease)
    with pytest.raises(LeaseLost, match="second trainer"):
        train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))
    assert ws.dictionary_ids() == []


def _held_dictionary_leases(ws: Workspace) -> list[str]:
    folder = os.path.join(ws.url, ".leases", "dictionaries")
    return [f"dictionaries/{name[:-len('.json')]}" for name in os.listdir(folder)]
