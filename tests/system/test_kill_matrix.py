"""SIGKILL each stage at chosen store writes, rerun, and compare with an uninterrupted run.

A child process runs a stage function on a local workspace with ``LocalStore.set``
wrapped so that the process SIGKILLs itself just before the N-th write whose key matches
a pattern: the kill lands at a known point (between a chunk's data and its done flag,
between a dictionary's atoms and its attributes, before the pointer moves…). The
children run in parallel; each rerun happens here, with plain stage functions.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import textwrap
import time

import pytest
from conftest import store_snapshot

from atomline.stages import encode, evaluate, pool, train
from atomline.stages.workspace import Workspace
from atomline.stages.options import PoolOptions, TrainOptions

pytestmark = pytest.mark.slow

TRAIN = dict(n_atoms=16, patch_size=128, stride=128, sample_patches=1000, seed=0,
             coder_options={"n_nonzero": 3})

_CHILD = textwrap.dedent("""
    import json, os, re, signal, sys
    from zarr.storage import LocalStore

    url, stage, pattern, nth = sys.argv[1], sys.argv[2], re.compile(sys.argv[3]), int(sys.argv[4])
    seen = 0
    _set = LocalStore.set

    async def set_then_maybe_die(self, key, value, byte_range=None):
        global seen
        if pattern.search(key):
            seen += 1
            if seen == nth:
                from test_kill_matrix import descendants
                with open(url + ".descendants.json", "w") as fh:
                    json.dump(descendants(os.getpid()), fh)
                os.kill(os.getpid(), signal.SIGKILL)
        return await _set(self, key, value)

    LocalStore.set = set_then_maybe_die
    from test_kill_matrix import run_stage
    run_stage(url, stage)
    sys.exit(3)  # the kill point was never reached
""")


def descendants(pid: int) -> dict[int, str]:
    """Every process below ``pid`` (children, theirs, ...), with its start time, from /proc."""
    parents: dict[int, list[int]] = {}
    started: dict[int, str] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
        except OSError:  # ended while we looked
            continue
        parents.setdefault(int(fields[1]), []).append(int(entry))  # field 4: parent pid
        started[int(entry)] = fields[19]  # field 22: start time, tells a reused pid apart
    found, todo = {}, [pid]
    while todo:
        for child in parents.get(todo.pop(), []):
            found[child] = started[child]
            todo.append(child)
    return found


def still_alive(processes: dict) -> list[int]:
    """Those of ``processes`` (pid -> start time) still running (zombies count as ended)."""
    alive = []
    for pid, start in processes.items():
        try:
            with open(f"/proc/{pid}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if fields[19] == start and fields[0] != "Z":
            alive.append(int(pid))
    return alive


def run_stage(url: str, stage: str) -> dict:
    """The stage sequences the matrix kills (shared by the children and the reruns)."""
    dict_id = train.train_dictionary(url, "vib", TrainOptions(**TRAIN))["dict_id"]
    if stage == "train":
        return {"dict_id": dict_id}
    if stage in ("encode", "nightly"):
        p = encode.prepare_encode(url, "vib", dict_id)
        encode.encode_chunks(url, "vib", dict_id, p["pending"])
    if stage in ("pool", "nightly"):
        p = pool.prepare_pool(url, "vib", dict_id, options=PoolOptions(regions=2))
        pool.pool_chunks(url, "vib", dict_id, p["pending"])
    if stage in ("evaluate", "nightly"):
        run_id = evaluate.evaluate_features(url, "vib", dict_id)["run_id"]
        if stage == "nightly":
            Workspace.open(url).promote(dict_id, evaluation=run_id)
        return {"dict_id": dict_id, "run_id": run_id}
    return {"dict_id": dict_id}


# (stage, key pattern, n-th matching write to die before, what the point is)
KILLS = [
    ("train", r"dictionaries/[^/]+/zarr\.json$", 2, "atoms written, attributes not"),
    ("train", r"dictionaries/[^/]+/zarr\.json$", 3, "attributes written, complete flag not"),
    ("encode", r"codes/[^/]+/vib/value/c/", 3, "chunk 2: index written, value not"),
    ("encode", r"codes/[^/]+/vib/done/c/", 5, "chunk 4: data written, done flag not"),
    ("pool", r"features/[^/]+/vib/values/c/", 2, "mid chunk 1"),
    ("pool", r"features/[^/]+/vib/done/c/", 4, "chunk 3: data written, done flag not"),
    ("evaluate", r"evaluations/[^/]+/confusion_raw/", 1, "arrays half written"),
    ("evaluate", r"evaluations/[^/]+/zarr\.json$", 3, "attributes written, complete flag not"),
    ("nightly", r"features/[^/]+/vib/done/c/", 3, "candidate's features unfinished"),
    ("nightly", r"evaluations/[^/]+/zarr\.json$", 3, "candidate's evaluation unfinished"),
    ("nightly", r"^zarr\.json$", 1, "everything complete, pointer not yet moved"),
]


@pytest.fixture(scope="module")
def stages_ready(tmp_path_factory, demo_small):
    """Workspaces at the start of each stage, and an uninterrupted reference run."""
    X, y = demo_small
    base = tmp_path_factory.mktemp("kill")
    start = {}
    url = str(base / "records.zarr")
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X[:120], chunk_rows=10)
    ws.add_labels("vib", y[:120])
    start["train"] = start["nightly"] = url
    for stage, before in (("encode", "train"), ("pool", "encode"), ("evaluate", "pool")):
        start[stage] = str(base / f"{stage}.zarr")
        shutil.copytree(start[before], start[stage])
        run_stage(start[stage], before)
    reference = str(base / "reference.zarr")
    shutil.copytree(url, reference)
    ref = run_stage(reference, "nightly")
    return base, start, reference, ref


def _data(url: str, prefix: str) -> dict:
    return {k: v for k, v in store_snapshot(Workspace.open(url)).items()
            if k.startswith(prefix) and "/c/" in k}


def test_sigkill_matrix_then_rerun_gives_the_reference(stages_ready, tmp_path):
    base, start, reference, ref = stages_ready
    dict_id = ref["dict_id"]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([os.path.dirname(__file__),
                                                       os.path.dirname(os.path.dirname(__file__)),
                                                       os.environ.get("PYTHONPATH", "")]))
    children = []
    for i, (stage, pattern, nth, point) in enumerate(KILLS):
        url = str(tmp_path / f"kill-{i}.zarr")
        shutil.copytree(start[stage], url)
        child = subprocess.Popen([sys.executable, "-c", _CHILD, url, stage, pattern, str(nth)],
                                 env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        children.append((url, stage, point, child))
    ref_eval = Workspace.open(reference).evaluation(ref["run_id"])
    for url, stage, point, child in children:
        _, err = child.communicate(timeout=300)
        assert child.returncode == -signal.SIGKILL, f"{stage} / {point}: {err.decode()[-2000:]}"
        with open(url + ".descendants.json") as fh:
            assert still_alive(json.load(fh)) == [], f"{stage} / {point}: processes left behind"
        ws = Workspace.open(url)
        # Right after the kill: nothing incomplete looks complete, the pointer is safe.
        assert ws.promoted in (None, dict_id)
        if ws.promoted is not None:
            assert ws.output(pool.features_path(dict_id, "vib")).complete
        if stage == "train":
            assert not ws.has_dictionary(dict_id), point
        if stage == "evaluate":
            assert ws.evaluations() == [], point
        # Rerun (the stale lease of the killed process is taken over), then compare.
        result = run_stage(url, stage)
        ws = Workspace.open(url)
        assert result["dict_id"] == dict_id
        produced = {"train": 1, "encode": 2}.get(stage, 3)
        for prefix in ("dictionaries/", "codes/", "features/")[:produced]:
            assert _data(url, prefix) == _data(reference, prefix), f"{stage} / {point}: {prefix}"
        if stage in ("evaluate", "nightly"):
            evaluations = ws.evaluations()
            # One evaluation: one finished before the kill is found by its key, an
            # unfinished one is removed by the rerun.
            assert len(evaluations) == 1, point
            assert list(ws.root["evaluations"].group_keys()) == [evaluations[0]["run_id"]], point
            assert evaluations[0]["metrics"] == ref_eval["metrics"]
        if stage == "nightly":
            assert ws.promoted == dict_id
        assert not any(ws.lease_holder(p) for p in ("promoted", f"dictionaries/{dict_id}",
                                                    encode.codes_path(dict_id, "vib"),
                                                    pool.features_path(dict_id, "vib")))


def test_sigkill_of_a_command_leaves_no_temporary_server(labelled):
    """The CLI's temporary Prefect server dies with a command killed by SIGKILL."""
    url = labelled
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}  # its own server
    # serve runs until stopped: the kill lands while the command and its server both run.
    cmd = [sys.executable, "-m", "atomline.flows.cli", "serve", url, "vib", "--cron", "0 2 * * *",
           "--atoms", "8", "--patch-size", "128", "--stride", "128", "--sample", "500"]
    child = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        lines = []
        for line in child.stderr:  # the serve line comes once the server answered its health check
            lines.append(line)
            if line.startswith("serving deployment"):
                break
        assert lines and lines[-1].startswith("serving deployment"), "".join(lines)[-3000:]
        for _ in range(3000):  # wait for the API server below the command (any way it was started)
            below = descendants(child.pid)
            if any("prefect" in _cmdline(p) and ("server" in _cmdline(p) or "uvicorn" in _cmdline(p))
                   for p in below):
                break
            time.sleep(0.1)
        else:
            raise AssertionError(f"no Prefect server among {[_cmdline(p) for p in below]}")
        child.kill()
        child.wait(timeout=60)
        left = still_alive(below)
        for _ in range(100):  # the kernel delivers the server's SIGKILL as the command dies
            if not left:
                break
            time.sleep(0.1)
            left = still_alive(below)
        assert left == [], [_cmdline(p) for p in left]
    finally:
        child.kill()
        child.wait(timeout=60)


def _cmdline(pid: int) -> str:
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            return fh.read().replace(b"\0", b" ").decode()
    except OSError:
        return ""
