"""SIGKILL the train stage mid-run; the rerun resumes from the workspace's checkpoint."""

from __future__ import annotations

import shutil
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest

from atomline.flows.demo import vibration_records
from atomline.stages import train
from atomline.stages.workspace import Workspace
from atomline.stages.options import TrainOptions

pytestmark = pytest.mark.slow

OPTIONS = dict(n_atoms=32, patch_size=64, stride=32, sample_patches=3000, seed=4,
               learner_options={"n_passes": 20, "batch_size": 100, "checkpoint_every": 5})


def test_killed_training_resumes_to_the_same_dictionary(tmp_path):
    X, _ = vibration_records(300, seed=5)
    url = str(tmp_path / "ws.zarr")
    Workspace.open(url, create=True).add_records("vib", X, chunk_rows=50)
    ref_url = str(tmp_path / "reference.zarr")
    shutil.copytree(url, ref_url)
    reference = train.train_dictionary(ref_url, "vib", TrainOptions(**OPTIONS))

    child = subprocess.Popen([sys.executable, "-c", textwrap.dedent(f"""
        from atomline.stages import train
        from atomline.stages.options import TrainOptions
        train.train_dictionary({url!r}, "vib", TrainOptions(**{OPTIONS!r}))
    """)])
    dict_id = reference["dict_id"]
    saved = None
    deadline = time.monotonic() + 240
    while time.monotonic() < deadline and child.poll() is None:
        state = Workspace.open(url).load_checkpoint(dict_id)
        if state is not None and state.get("batches_seen", 0) >= 60:
            child.send_signal(signal.SIGKILL)
            saved = state["batches_seen"]
            break
        time.sleep(0.05)
    child.wait(timeout=30)
    assert saved is not None and child.returncode == -signal.SIGKILL, "training ended before the kill"
    ws = Workspace.open(url)
    assert not ws.has_dictionary(dict_id)  # killed: no dictionary, only a checkpoint
    assert ws.load_checkpoint(dict_id)["batches_seen"] >= saved

    resumed = train.train_dictionary(url, "vib", TrainOptions(**OPTIONS))
    assert resumed["dict_id"] == dict_id and resumed["reused"] is False
    np.testing.assert_array_equal(Workspace.open(url).load_dictionary(dict_id).atoms,
                                  Workspace.open(ref_url).load_dictionary(dict_id).atoms)
    assert Workspace.open(url).load_checkpoint(dict_id) is None  # replaced by the dictionary
