"""The workspace: records in chunks, links, labels, fingerprints, pointer, layout checks."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
import zarr

from atomline.stages.errors import (AtomlineError, FingerprintMismatch, InputError, LayoutError,
                                    NotFound, OutputExists)
from atomline.stages.workspace import LAYOUT_VERSION, Workspace


class _CountingRows:
    """An array-like that refuses to hand out more than ``limit`` rows at once.

    Stands in for a memory-mapped ``.npy`` larger than memory: a reader that asked for the
    whole array would fail here.
    """

    def __init__(self, data: np.ndarray, limit: int):
        self.data, self.limit, self.reads = data, limit, 0
        self.shape, self.dtype = data.shape, data.dtype

    def __getitem__(self, key):
        assert isinstance(key, slice), "rows must be read as slices"
        n = len(range(*key.indices(self.shape[0])))
        assert n <= self.limit, f"read {n} rows at once, more than {self.limit}"
        self.reads += 1
        return self.data[key]


def test_records_stream_in_chunks_and_read_back(memory_url):
    data = np.random.default_rng(0).standard_normal((103, 16)).astype(np.float32)
    source = _CountingRows(data, limit=10)
    ws = Workspace.open(memory_url, create=True)
    info = ws.add_records("sig", source, chunk_rows=10)
    assert source.reads == 22  # ceil(103 / 10) chunk reads to check, as many again to write
    assert info["n_chunks"] == 11 and info["shape"] == [103, 16]
    np.testing.assert_array_equal(ws.records("sig")[:], data)


def test_npy_file_is_memory_mapped(tmp_path, memory_url):
    data = np.random.default_rng(1).standard_normal((50, 8, 8)).astype(np.float64)
    path = tmp_path / "images.npy"
    np.save(path, data)
    ws = Workspace.open(memory_url, create=True)
    info = ws.add_records("img", str(path), chunk_rows=7)
    assert info["dtype"] == "float64" and info["n_chunks"] == 8
    np.testing.assert_array_equal(ws.records("img")[:], data)


def test_fingerprint_follows_content_not_chunking(memory_url):
    rng = np.random.default_rng(2)
    a = rng.standard_normal((40, 4)).astype(np.float32)
    ws = Workspace.open(memory_url, create=True)
    fa = ws.add_records("a", a, chunk_rows=7)["fingerprint"]
    fb = ws.add_records("b", a, chunk_rows=13)["fingerprint"]
    b = a.copy()
    b[17, 2] += 1e-3
    fc = ws.add_records("c", b, chunk_rows=7)["fingerprint"]
    assert fa == fb
    assert fa != fc


def test_link_existing_array_without_copying(tmp_path, memory_url):
    external = tmp_path / "theirs.zarr"
    group = zarr.open_group(str(external), mode="w")
    data = np.arange(60, dtype=np.float32).reshape(20, 3)
    group.create_array("nested/arr", data=data, chunks=(6, 3))
    ws = Workspace.open(memory_url, create=True)
    info = ws.link_records("linked", str(external), "nested/arr")
    assert info["shape"] == [20, 3]
    np.testing.assert_array_equal(ws.records("linked")[:], data)
    # Only the link lives in the workspace: no data chunks were written under data/linked.
    assert list(ws.root["data/linked"].keys()) == []
    assert ws.root["data/linked"].attrs["link"] == {"url": str(external), "path": "nested/arr"}


def test_labels_checked_against_records(memory_url):
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("r", np.zeros((6, 4), np.float32))
    with pytest.raises(InputError, match="6 labels"):
        ws.add_labels("r", np.zeros(5, dtype=int))
    with pytest.raises(InputError, match="integer"):
        ws.add_labels("r", np.zeros(6, dtype=float))
    info = ws.add_labels("r", np.array([0, 1, 0, 1, 2, 2]))
    assert info["classes"] == [0, 1, 2]
    np.testing.assert_array_equal(ws.labels("r"), [0, 1, 0, 1, 2, 2])


@pytest.mark.parametrize(
    "bad, message",
    [
        (np.zeros((0, 4), np.float32), "non-empty"),
        (np.zeros((4,), np.float32), "rank"),
        (np.zeros((2, 2, 2, 2, 2), np.float32), "rank"),
        (np.zeros((4, 4), np.int32), "float32 or float64"),
        (np.array([[1.0, None]], dtype=object), "float32 or float64"),
        (np.array([[1.0, np.nan]], dtype=np.float32), "row 0"),
        (np.array([[1.0, 2.0], [np.inf, 0.0]]), "row 1"),
        (np.zeros((3, 3), np.float16), "float32 or float64"),
    ],
)
def test_bad_records_refused_before_anything_is_written(memory_url, bad, message):
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("keep", np.ones((3, 2), np.float32))
    from conftest import store_snapshot

    before = store_snapshot(ws)
    with pytest.raises(InputError, match=message):
        ws.add_records("new", bad, chunk_rows=1 if bad.ndim else None)
    after = store_snapshot(ws)
    # NaN found in the first chunk: nothing of "new" may be marked as valid records.
    assert {k: v for k, v in after.items() if not k.startswith("data/new")} == before
    if "data/new/zarr.json" in after:
        assert "fingerprint" not in json.loads(after["data/new/zarr.json"])["attributes"]


def test_names_cannot_escape_their_folder(memory_url):
    ws = Workspace.open(memory_url, create=True)
    for name in ("../x", "a/b", "", ".hidden", ".."):
        with pytest.raises(InputError, match="plain name"):
            ws.add_records(name, np.ones((2, 2), np.float32))


def test_existing_records_not_overwritten_unless_asked(memory_url):
    ws = Workspace.open(memory_url, create=True)
    ws.add_records("r", np.ones((2, 2), np.float32))
    with pytest.raises(OutputExists, match="overwrite"):
        ws.add_records("r", np.zeros((2, 2), np.float32))
    ws.add_records("r", np.zeros((2, 2), np.float32), overwrite=True)
    assert ws.records("r")[:].sum() == 0


def test_foreign_and_future_stores_refused(tmp_path):
    foreign = tmp_path / "foreign.zarr"
    zarr.open_group(str(foreign), mode="w").create_array("x", data=np.ones(3))
    with pytest.raises(LayoutError, match="written by something else"):
        Workspace.open(str(foreign))
    future = tmp_path / "future.zarr"
    ws = Workspace.open(str(future), create=True)
    mark = dict(ws.root.attrs["atomline"])
    mark["layout"] = LAYOUT_VERSION + 1
    ws.root.attrs["atomline"] = mark
    with pytest.raises(LayoutError, match="Upgrade atomline"):
        Workspace.open(str(future))
    with pytest.raises(NotFound):
        Workspace.open(str(tmp_path / "absent.zarr"))
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("not a workspace")
    with pytest.raises(LayoutError, match="other files"):
        Workspace.open(str(tmp_path / "busy"), create=True)


def test_pointer_and_dictionary_completeness(memory_url):
    ws = Workspace.open(memory_url, create=True)
    assert ws.promoted is None
    with pytest.raises(NotFound):
        ws.promote("d-missing")
    stored = ws.save_dictionary("d-one", np.eye(3), {"method": "test", "n_atoms": 3})
    assert stored.fingerprint == ws.load_dictionary("d-one").fingerprint
    ws.promote("d-one")
    assert Workspace.open(memory_url).promoted == "d-one"
    with pytest.raises(OutputExists):
        ws.save_dictionary("d-one", np.eye(3), {"method": "test"})
    # A dictionary whose write stopped before its attributes is not usable.
    ws.root.create_group("dictionaries/d-half").create_array("atoms", data=np.eye(2))
    assert not ws.has_dictionary("d-half")
    with pytest.raises(NotFound, match="did not finish"):
        ws.load_dictionary("d-half")
    assert ws.dictionary_ids() == ["d-one"]


def test_every_error_is_in_one_family():
    for cls in (InputError, LayoutError, NotFound, OutputExists, FingerprintMismatch):
        assert issubclass(cls, AtomlineError)


def test_summary_lists_contents(tmp_path):
    ws = Workspace.open(str(tmp_path / "ws"), create=True)
    ws.add_records("r", np.ones((4, 2), np.float32), chunk_rows=2)
    ws.add_labels("r", np.array([0, 1, 0, 1]))
    summary = ws.summary()
    assert summary["records"]["r"]["labelled"] is True
    assert summary["records"]["r"]["n_chunks"] == 2
    assert summary["promoted"] is None and summary["evaluations"] == 0
    assert os.path.isdir(tmp_path / "ws" / "data" / "r")
