"""One opened workspace per URL and storage options in a process, never stale."""

from __future__ import annotations

import shutil
import threading

import fsspec
import numpy as np
import pytest

from atomline.stages.errors import NotFound
from atomline.stages.workspace import Workspace, open_workspace


def _atoms(seed: int) -> np.ndarray:
    W = np.random.default_rng(seed).standard_normal((4, 32))
    return W / np.linalg.norm(W, axis=1, keepdims=True)


def test_same_url_same_object_across_threads(memory_url):
    Workspace.open(memory_url, create=True)
    got = []
    threads = [threading.Thread(target=lambda: got.append(open_workspace(memory_url))) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(got) == 8 and all(ws is got[0] for ws in got)
    assert open_workspace(got[0]) is got[0]  # an opened workspace is passed through
    # Other storage options are another opening.
    assert open_workspace(memory_url, {"skip_instance_cache": True}) is not got[0]


def test_handed_out_workspace_sees_a_pointer_moved_by_another_object(memory_url):
    Workspace.open(memory_url, create=True)
    cached = open_workspace(memory_url)
    assert cached.promoted is None
    other = Workspace.open(memory_url)
    for dict_id in ("d-a", "d-b"):
        other.save_dictionary(dict_id, _atoms(len(dict_id)), {"method": "test"})
    other.promote("d-a")
    assert open_workspace(memory_url).promoted == "d-a"
    # The cached object's own promotion is seen by a fresh open, and the reverse again.
    open_workspace(memory_url).promote("d-b")
    assert Workspace.open(memory_url).promoted == "d-b"
    other.promote("d-a")
    assert open_workspace(memory_url) is cached and cached.promoted == "d-a"


def test_deleted_directory_is_opened_afresh(tmp_path):
    place = tmp_path / "ws.zarr"
    Workspace.open(place, create=True).save_dictionary("d-a", _atoms(0), {"method": "test"})
    first = open_workspace(place)
    assert first.dictionary_ids() == ["d-a"]
    shutil.rmtree(place)
    with pytest.raises(NotFound):
        open_workspace(place)
    Workspace.open(place, create=True)  # a new, empty workspace at the same place
    again = open_workspace(place)
    assert again is not first and again.dictionary_ids() == []


def test_cleared_memory_store_is_opened_afresh(memory_url):
    Workspace.open(memory_url, create=True).save_dictionary("d-a", _atoms(0), {"method": "test"})
    first = open_workspace(memory_url)
    fsspec.filesystem("memory").rm(memory_url[len("memory://"):], recursive=True)
    with pytest.raises(NotFound):
        open_workspace(memory_url)
    Workspace.open(memory_url, create=True)
    again = open_workspace(memory_url)
    assert again is not first and again.dictionary_ids() == []
