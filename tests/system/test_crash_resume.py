"""SIGKILL the encode flow's process half-way, run it again: same bytes, finished chunks skipped."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from atomline.stages import encode, train
from atomline.stages.workspace import Workspace
from atomline.stages.options import TrainOptions

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("prefect_harness")]


def _cli_env() -> dict:
    """Point the child at this session's Prefect API instead of a new temporary server."""
    from prefect.settings import PREFECT_API_URL

    env = dict(os.environ)
    env["PREFECT_API_URL"] = PREFECT_API_URL.value()
    return env


def _chunk_files(root, prefix):
    base = os.path.join(root, prefix)
    out = {}
    for dirpath, _, files in os.walk(base):
        for f in files:
            if f != "zarr.json":
                path = os.path.join(dirpath, f)
                with open(path, "rb") as fh:
                    out[os.path.relpath(path, root)] = fh.read()
    return out


def test_sigkill_during_encode_then_rerun(tmp_path, demo_small):
    X, y = demo_small
    url = str(tmp_path / "ws.zarr")
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X, chunk_rows=8)
    dict_id = train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=64, patch_size=64, stride=16, sample_patches=4000, seed=2))["dict_id"]
    ws.promote(dict_id)

    # Reference: an uninterrupted run of the same stage on a copy of the workspace.
    ref_url = str(tmp_path / "reference.zarr")
    shutil.copytree(url, ref_url)
    ref = encode.prepare_encode(ref_url, "vib", dict_id)
    encode.encode_chunks(ref_url, "vib", dict_id, ref["pending"])
    n_chunks = ref["n_chunks"]

    cmd = [sys.executable, "-m", "atomline.flows.cli", "encode", url, "vib", "--workers", "1", "--json"]
    child = subprocess.Popen(cmd, env=_cli_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    done_path = f"codes/{dict_id}/vib"
    killed_at = None
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline and child.poll() is None:
        if Workspace.open(url).has_output(done_path):
            done = int(Workspace.open(url).output(done_path).done_flags().sum())
            if done >= n_chunks // 4:
                child.send_signal(signal.SIGKILL)
                killed_at = done
                break
        time.sleep(0.01)
    child.wait(timeout=30)
    assert killed_at is not None, "the encode finished before it could be killed: " + child.stderr.read().decode()[-2000:]
    assert child.returncode == -signal.SIGKILL
    finished = int(Workspace.open(url).output(done_path).done_flags().sum())
    assert killed_at <= finished < n_chunks, "the kill must land half-way"

    rerun = subprocess.run(cmd, env=_cli_env(), capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr[-3000:]
    report = json.loads(rerun.stdout)
    assert report["skipped"] == finished
    assert report["encoded"] == n_chunks - finished
    assert _chunk_files(url, done_path) == _chunk_files(ref_url, done_path)
    np.testing.assert_array_equal(Workspace.open(url).output(done_path).done_flags(),
                                  np.ones(n_chunks, bool))
