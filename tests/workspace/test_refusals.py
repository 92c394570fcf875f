"""Bad input at every boundary is refused with a clear message, and nothing stored changes.

Also: crafted stores (object dtypes, pickling codecs in Zarr v2 and v3, a layout from the
future, attributes of the wrong types) are refused before any chunk is decoded; a marker
file that the pickled payload would create proves that no code ran.
"""

from __future__ import annotations

import json
import os
import pathlib
import pickle
import shutil

import numpy as np
import pytest
from conftest import store_snapshot

from atomline.stages import encode, evaluate, pool, train
from atomline.stages.errors import (FingerprintMismatch, InputError, LayoutError, NotFound,
                                    UnsafeStore)
from atomline.stages.workspace import LAYOUT_VERSION, Workspace
from atomline.stages.options import EncodeOptions, EvaluateOptions, PoolOptions, TrainOptions

TRAIN = dict(n_atoms=16, patch_size=128, stride=128, sample_patches=1000, seed=0,
             coder_options={"n_nonzero": 3})


@pytest.fixture(scope="module")
def finished(tmp_path_factory, demo_small):
    """A local workspace with records, labels, a promoted dictionary, codes, features and
    an evaluation: every kind of output a refused call must leave alone."""
    X, y = demo_small
    url = str(tmp_path_factory.mktemp("refusals") / "ws.zarr")
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X[:160], chunk_rows=40)
    ws.add_labels("vib", y[:160])
    ws.add_records("other", X[:50, :1024], chunk_rows=25)
    ws.add_labels("other", y[:50])
    ws.add_records("mono", np.ones((160, 8), np.float32))
    ws.add_labels("mono", np.zeros(160, dtype=int))
    dict_id = train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))["dict_id"]
    prepared = encode.prepare_encode(ws, "vib", dict_id)
    encode.encode_chunks(ws, "vib", dict_id, prepared["pending"])
    pooled = pool.prepare_pool(ws, "vib", dict_id, options=PoolOptions(regions=2))
    pool.pool_chunks(ws, "vib", dict_id, pooled["pending"])
    run_id = evaluate.evaluate_features(ws, "vib", dict_id)["run_id"]
    ws.promote(dict_id, evaluation=run_id)
    return url, dict_id, run_id


def _external_float_array(tmp_path) -> str:
    import zarr

    path = str(tmp_path / "theirs.zarr")
    zarr.open_group(path, mode="w").create_array("a", data=np.ones((4, 3), np.float32))
    return path


# Each case: (id, call(ws, dict_id, run_id, tmp_path), error class, words the message must hold)
BAD = [
    ("nan-records", lambda ws, d, r, t: ws.add_records("new", np.array([[1.0, np.nan]], np.float32)),
     InputError, "row 0"),
    ("inf-in-later-chunk", lambda ws, d, r, t: ws.add_records(
        "new", np.vstack([np.ones((3, 2)), [[np.inf, 0]]]).astype(np.float32), chunk_rows=2),
     InputError, "row 3"),
    ("overwrite-with-bad-records", lambda ws, d, r, t: ws.add_records(
        "vib", np.vstack([np.ones((50, 2048)), np.full((1, 2048), np.nan)]).astype(np.float32),
        chunk_rows=10, overwrite=True), InputError, "row 50"),
    ("rank-1-records", lambda ws, d, r, t: ws.add_records("new", np.ones(5, np.float32)),
     InputError, "rank"),
    ("integer-records", lambda ws, d, r, t: ws.add_records("new", np.ones((3, 3), np.int64)),
     InputError, "float32 or float64"),
    ("object-records", lambda ws, d, r, t: ws.add_records("new", np.array([[1.0, None]], dtype=object)),
     InputError, "float32 or float64"),
    ("empty-records", lambda ws, d, r, t: ws.add_records("new", np.zeros((0, 4), np.float32)),
     InputError, "non-empty"),
    ("zero-chunk-rows", lambda ws, d, r, t: ws.add_records("new", np.ones((3, 3), np.float32), chunk_rows=0),
     InputError, "positive"),
    ("name-escapes", lambda ws, d, r, t: ws.add_records("../escape", np.ones((2, 2), np.float32)),
     InputError, "plain name"),
    ("name-with-newline", lambda ws, d, r, t: ws.add_records("vib\nforged line", np.ones((2, 2), np.float32)),
     InputError, "control characters"),
    ("name-with-terminal-escape", lambda ws, d, r, t: ws.add_records("x\x1b[2J", np.ones((2, 2), np.float32)),
     InputError, "control characters"),
    ("ragged-list-records", lambda ws, d, r, t: ws.add_records("new", [[1.0, 2.0], [3.0]]),
     InputError, "rows of equal length"),
    ("encode-chunk-out-of-range", lambda ws, d, r, t: encode.encode_chunks(ws, "vib", d, [0, 99]),
     InputError, "chunk numbers 0..3"),
    ("pool-chunk-out-of-range", lambda ws, d, r, t: pool.pool_chunks(ws, "vib", d, [-1]),
     InputError, "chunk numbers 0..3"),
    ("coder-option-unknown", lambda ws, d, r, t: encode.prepare_encode(ws, "vib", d, options=EncodeOptions(coder_options={"encoder": "mine"})), InputError, "unknown ['encoder']"),
    ("labels-wrong-length", lambda ws, d, r, t: ws.add_labels("vib", np.zeros(159, int), overwrite=True),
     InputError, "160 labels"),
    ("labels-not-integer", lambda ws, d, r, t: ws.add_labels("vib", np.zeros(160), overwrite=True),
     InputError, "integer"),
    ("labels-negative", lambda ws, d, r, t: ws.add_labels("vib", np.r_[np.zeros(159, int), -1], overwrite=True),
     InputError, "row 159"),
    ("labels-beyond-int64", lambda ws, d, r, t: ws.add_labels(
        "vib", np.r_[np.zeros(150, np.uint64), np.full(10, 2**63, np.uint64)], overwrite=True),
     InputError, "label 9223372036854775808"),
    ("appended-labels-negative", lambda ws, d, r, t: ws.append_records(
        "vib", np.ones((2, 2048), np.float32), labels=np.array([0, -3])), InputError, "label -3"),
    ("labels-without-records", lambda ws, d, r, t: ws.add_labels("absent", np.zeros(3, int)),
     NotFound, "data/absent"),
    ("dictionary-of-other-width", lambda ws, d, r, t: encode.prepare_encode(ws, "other", d),
     InputError, "records shaped"),
    ("codes-from-other-parameters", lambda ws, d, r, t: encode.prepare_encode(ws, "vib", d, options=EncodeOptions(coder="omp", coder_options={"n_nonzero": 2})), FingerprintMismatch, "overwrite"),
    ("unknown-dictionary", lambda ws, d, r, t: encode.prepare_encode(ws, "vib", "d-unknown"),
     NotFound, "dictionaries/d-unknown"),
    ("bad-chunk-choice", lambda ws, d, r, t: encode.encode_chunks(ws, "vib", d, [0], options=EncodeOptions(on_bad_chunk="ignore")),
     InputError, "on_bad_chunk"),
    ("pool-bad-chunk-choice", lambda ws, d, r, t: pool.pool_chunks(ws, "vib", d, [0], options=PoolOptions(on_bad_chunk="ignore")),
     InputError, "on_bad_chunk"),
    ("evaluate-bad-chunk-choice", lambda ws, d, r, t: evaluate.evaluate_features(ws, "vib", d, options=EvaluateOptions(on_bad_chunk="ignore")), InputError, "on_bad_chunk"),
    ("too-few-samples", lambda ws, d, r, t: train.train_dictionary(ws, "vib", options=TrainOptions(n_atoms=64, sample_patches=10)),
     InputError, "sample_patches"),
    ("too-many-regions", lambda ws, d, r, t: pool.prepare_pool(ws, "vib", d, options=PoolOptions(regions=99)),
     InputError, "regions"),
    ("labels-of-other-records", lambda ws, d, r, t: evaluate.evaluate_features(ws, "vib", d, labels="other"),
     InputError, "160 labels"),
    ("single-class-labels", lambda ws, d, r, t: evaluate.evaluate_features(ws, "vib", d, labels="mono"),
     InputError, "two classes"),
    ("nan-atoms", lambda ws, d, r, t: ws.save_dictionary("d-nan", np.full((2, 3), np.nan), {}),
     InputError, "finite"),
    ("output-path-escapes", lambda ws, d, r, t: ws.output(f"codes/{d}/../../data"),
     InputError, "output path"),
    ("output-outside-outputs", lambda ws, d, r, t: ws.create_output(
        "data/vib/x", n_rows=1, chunk_rows=1, arrays={}, attrs={"fingerprint": "f"}),
     InputError, "output path"),
    ("link-path-escapes", lambda ws, d, r, t: ws.link_records("new", _external_float_array(t), "../a"),
     InputError, "relative path"),
    ("link-absolute-path", lambda ws, d, r, t: ws.link_records("new", _external_float_array(t), "/etc/a"),
     InputError, "relative path"),
    ("link-url-with-credentials", lambda ws, d, r, t: ws.link_records("new", "s3://key:secret@bucket/x", "a"),
     InputError, "without credentials"),
    ("url-climbs-out", lambda ws, d, r, t: ws.link_records("new", "memory://base/../elsewhere", "a"),
     InputError, "'..'"),
    ("promote-on-other-evaluation", lambda ws, d, r, t: ws.promote("d-absent", evaluation=r),
     NotFound, "dictionaries/d-absent"),
    ("promote-unknown-evaluation", lambda ws, d, r, t: ws.promote(d, evaluation="e-none"),
     NotFound, "evaluations/e-none"),
    ("lease-ttl-not-positive", lambda ws, d, r, t: ws.lease(f"codes/{d}/vib", ttl=0),
     InputError, "ttl"),
]


@pytest.mark.parametrize("case, call, error, words", BAD, ids=[b[0] for b in BAD])
def test_bad_input_is_refused_and_nothing_changes(finished, tmp_path, case, call, error, words):
    url, dict_id, run_id = finished
    ws = Workspace.open(url)
    before = store_snapshot(ws)
    with pytest.raises(error) as caught:
        call(ws, dict_id, run_id, tmp_path)
    message = str(caught.value)
    assert words in message
    assert "expected" in message and "found" in message  # the one message shape
    assert store_snapshot(ws) == before
    assert Workspace.open(url).promoted == dict_id


def test_at_least_fifteen_kinds_of_bad_input():
    assert len({b[0] for b in BAD}) >= 15


# ---------------------------------------------------------------- crafted stores

class _TouchOnUnpickle:
    """Unpickling this creates a file: proof that code ran."""

    def __init__(self, path):
        self.path = path

    def __reduce__(self):
        return (pathlib.Path.touch, (pathlib.Path(self.path),))


def _payload(marker) -> bytes:
    return pickle.dumps(_TouchOnUnpickle(str(marker)), protocol=4)


def test_payload_really_runs_code_when_unpickled(tmp_path):
    """The marker test below could fail: unpickling the payload does create the file."""
    probe = tmp_path / "probe"
    pickle.loads(_payload(probe))
    assert probe.exists()


#: Crafted array metadata documents, one file each (made by fixtures/make_fixtures.py).
UNSAFE = pathlib.Path(__file__).resolve().parents[2] / "fixtures" / "unsafe"
CRAFTED = sorted(p.stem for p in UNSAFE.glob("*.json"))


def _unsafe(case: str) -> dict:
    return json.loads((UNSAFE / f"{case}.json").read_text())


def _crafted_array(root: pathlib.Path, case: str, payload: bytes) -> str:
    """Write the crafted document of ``case`` as an array at ``root/a`` with one chunk."""
    doc = _unsafe(case)["document"]
    path = root / "a"
    if doc["zarr_format"] == 2:
        path.mkdir(parents=True)
        (path / ".zarray").write_text(json.dumps(doc))
        (path / "0.0").write_bytes(payload)
    else:
        (path / "c" / "0").mkdir(parents=True)
        (path / "zarr.json").write_text(json.dumps(doc))
        (path / "c" / "0" / "0").write_bytes(payload)
    return str(path)


PICKLE_V3 = _unsafe("v3-pickle-codec")["document"]["codecs"][0]


def test_crafted_documents_are_all_there():
    assert len(CRAFTED) == 8 and {c.split("-")[0] for c in CRAFTED} == {"v2", "v3"}


@pytest.mark.parametrize("case", CRAFTED)
def test_crafted_linked_arrays_refused_without_unpickling(tmp_path, memory_url, case):
    marker = tmp_path / "MARKER"
    array_path = _crafted_array(tmp_path / "crafted", case, _payload(marker))
    ws = Workspace.open(memory_url, create=True)
    before = store_snapshot(ws)
    with pytest.raises(UnsafeStore, match=_unsafe(case)["refused_because"]):
        ws.link_records("bad", array_path)
    assert not marker.exists()
    assert store_snapshot(ws) == before


def _rewrite_json(path: pathlib.Path, change) -> None:
    doc = json.loads(path.read_text())
    change(doc)
    path.write_text(json.dumps(doc))


@pytest.fixture
def copy_of(finished, tmp_path):
    """A private copy of the finished workspace, to tamper with."""
    url, dict_id, run_id = finished
    target = tmp_path / "copy.zarr"
    shutil.copytree(url, target)
    return target, dict_id, run_id


def _tamper_codes_codec(root, d, r):
    _rewrite_json(root / f"codes/{d}/vib/value/zarr.json",
                  lambda doc: doc.__setitem__("codecs", [PICKLE_V3]))
    return lambda ws: ws.output(f"codes/{d}/vib")


def _tamper_records_dtype(root, d, r):
    _rewrite_json(root / "data/vib/zarr.json", lambda doc: doc.__setitem__("data_type", "object"))
    return lambda ws: ws.records("vib")


def _tamper_atoms_codec(root, d, r):
    _rewrite_json(root / f"dictionaries/{d}/atoms/zarr.json",
                  lambda doc: doc["codecs"].insert(0, PICKLE_V3))
    return lambda ws: ws.load_dictionary(d)


def _tamper_confusion_dtype(root, d, r):
    _rewrite_json(root / f"evaluations/{r}/confusion_features/zarr.json",
                  lambda doc: doc.__setitem__("data_type", "object"))
    return lambda ws: ws.evaluation_arrays(r)


def _tamper_labels_codec(root, d, r):
    _rewrite_json(root / "labels/vib/zarr.json", lambda doc: doc.__setitem__("codecs", [PICKLE_V3]))
    return lambda ws: ws.labels("vib")


@pytest.mark.parametrize("tamper", [_tamper_codes_codec, _tamper_records_dtype, _tamper_atoms_codec,
                                    _tamper_confusion_dtype, _tamper_labels_codec])
def test_crafted_arrays_inside_a_workspace_refused(copy_of, tmp_path, tamper):
    root, dict_id, run_id = copy_of
    marker = tmp_path / "MARKER"
    read = tamper(root, dict_id, run_id)
    # Put the payload in every chunk file of the workspace, so any decode would unpickle it.
    for dirpath, _, files in os.walk(root):
        if f"{os.sep}c{os.sep}" in dirpath + os.sep or dirpath.endswith(f"{os.sep}c"):
            for f in files:
                pathlib.Path(dirpath, f).write_bytes(_payload(marker))
    ws = Workspace.open(str(root))
    with pytest.raises(UnsafeStore):
        read(ws)
    assert not marker.exists()


def test_future_layout_and_v2_workspace_refused(copy_of, tmp_path):
    root, _, _ = copy_of
    _rewrite_json(root / "zarr.json", lambda doc: doc["attributes"]["atomline"].__setitem__(
        "layout", LAYOUT_VERSION + 1))
    with pytest.raises(LayoutError, match=f"version {LAYOUT_VERSION + 1}"):
        Workspace.open(str(root))
    v2 = tmp_path / "v2.zarr"
    v2.mkdir()
    (v2 / ".zgroup").write_text(json.dumps({"zarr_format": 2}))
    (v2 / ".zattrs").write_text(json.dumps({"atomline": {"layout": 1, "promoted": None}}))
    with pytest.raises(LayoutError, match="Zarr v3"):
        Workspace.open(str(v2))


WRONG_TYPES = [
    ("root-pointer-not-a-string", "zarr.json", lambda a, d: a["atomline"].__setitem__("promoted", 5),
     lambda ws, d, r: Workspace.open(ws.url), "'promoted'"),
    ("root-layout-a-string", "zarr.json", lambda a, d: a["atomline"].__setitem__("layout", "1"),
     lambda ws, d, r: Workspace.open(ws.url), "layout number"),
    ("records-fingerprint-a-list", "data/vib/zarr.json", lambda a, d: a.__setitem__("fingerprint", [1]),
     lambda ws, d, r: ws.records("vib"), "'fingerprint'"),
    ("dictionary-fingerprint-an-int", "dictionaries/{d}/zarr.json",
     lambda a, d: a.__setitem__("fingerprint", 123), lambda ws, d, r: ws.load_dictionary(d), "'fingerprint'"),
    ("dictionary-prep-arrays-a-string", "dictionaries/{d}/zarr.json",
     lambda a, d: a.__setitem__("prep_arrays", "mean"), lambda ws, d, r: ws.load_dictionary(d), "'prep_arrays'"),
    ("dictionary-k-a-bool", "dictionaries/{d}/zarr.json",
     lambda a, d: a.__setitem__("n_atoms", True), lambda ws, d, r: ws.load_dictionary(d), "'n_atoms'"),
    ("codes-patches-a-string", "codes/{d}/vib/zarr.json",
     lambda a, d: a.__setitem__("patches_per_record", "16"),
     lambda ws, d, r: ws.output(f"codes/{d}/vib"), "'patches_per_record'"),
    ("features-params-missing", "features/{d}/vib/zarr.json", lambda a, d: a.pop("params"),
     lambda ws, d, r: pool.prepare_pool(ws, "vib", d, options=PoolOptions(regions=2)), "'params'"),
    ("evaluation-metrics-a-string", "evaluations/{r}/zarr.json", lambda a, d: a.__setitem__("metrics", "good"),
     lambda ws, d, r: ws.evaluation(r), "'metrics'"),
]


@pytest.mark.parametrize("case, doc, change, read, words", WRONG_TYPES, ids=[w[0] for w in WRONG_TYPES])
def test_attributes_of_the_wrong_type_refused(copy_of, case, doc, change, read, words):
    root, dict_id, run_id = copy_of
    ws = Workspace.open(str(root))
    _rewrite_json(root / doc.format(d=dict_id, r=run_id), lambda m: change(m["attributes"], dict_id))
    with pytest.raises(LayoutError, match=words):
        read(ws, dict_id, run_id)


# ---------------------------------------------------------------- links in a local workspace

def _outside_tree(path: pathlib.Path) -> dict[str, bytes]:
    return {str(p.relative_to(path)): p.read_bytes() for p in path.rglob("*") if p.is_file()}


@pytest.mark.parametrize("as_url", [False, True], ids=["path", "file-url"])
def test_folder_linked_outside_the_workspace_refused_on_read_and_write(copy_of, tmp_path, as_url):
    root, dict_id, _ = copy_of
    outside = tmp_path / "outside"
    shutil.move(root / "codes", outside)  # the codes now live elsewhere, reached by a link
    (root / "codes").symlink_to(outside, target_is_directory=True)
    ws = Workspace.open(f"file://{root}" if as_url else str(root))
    before = _outside_tree(outside)
    with pytest.raises(UnsafeStore, match="leading outside") as caught:  # read
        ws.output(encode.codes_path(dict_id, "vib"))
    assert "expected" in str(caught.value) and "found" in str(caught.value)
    shutil.rmtree(outside / dict_id)  # and with nothing there yet: write
    with pytest.raises(UnsafeStore, match="leading outside"):
        encode.prepare_encode(ws, "vib", dict_id)
    # Not one file written outside (only the codes group's own metadata is there).
    assert _outside_tree(outside) == {k: v for k, v in before.items() if not k.startswith(dict_id)}


@pytest.mark.parametrize("on_bad_chunk", ["stop", "skip"])
def test_chunk_file_replaced_by_a_link_refused_naming_it(copy_of, on_bad_chunk):
    root, dict_id, _ = copy_of
    chunk = root / "data" / "vib" / "c" / "1" / "0"
    chunk.unlink()
    chunk.symlink_to(root / "data" / "vib" / "c" / "0" / "0")  # another valid chunk, inside
    ws = Workspace.open(str(root))
    with pytest.raises(UnsafeStore, match="data/vib/c/1/0.*symbolic link"):
        ws.read_chunk("vib", 1)
    encode.prepare_encode(ws, "vib", dict_id, overwrite=True)
    path = encode.codes_path(dict_id, "vib")
    # Refused, not a bad chunk to skip: a link is never read as data.
    with pytest.raises(UnsafeStore, match="data/vib/c/1/0"):
        encode.encode_chunks(ws, "vib", dict_id, [1], options=EncodeOptions(on_bad_chunk=on_bad_chunk))
    assert ws.output(path).pending() == [0, 1, 2, 3]


# ---------------------------------------------------------------- accepted as asked

def test_coder_options_given_are_merged_into_the_dictionarys(copy_of):
    root, dict_id, _ = copy_of
    ws = Workspace.open(str(root))
    trained = ws.load_dictionary(dict_id).attrs["coder_options"]
    assert trained == {"n_nonzero": 3}
    got = encode.prepare_encode(ws, "vib", dict_id, overwrite=True, options=EncodeOptions(coder_options={"tol": 1e-6}))
    assert got["coder"] == "omp" and got["coder_options"] == {"n_nonzero": 3, "tol": 1e-6}
    got = encode.prepare_encode(ws, "vib", dict_id, overwrite=True, options=EncodeOptions(coder="omp", coder_options={"n_nonzero": 2}))
    assert got["coder_options"] == {"n_nonzero": 2}  # a given option replaces its own name only


def test_records_from_a_list_of_rows(memory_url):
    ws = Workspace.open(memory_url, create=True)
    rows = [[0.5, 1.5, 2.5], [3.5, 4.5, 5.5]]
    info = ws.add_records("rows", rows)
    assert info["shape"] == [2, 3] and info["dtype"] == "float64"
    np.testing.assert_array_equal(ws.records("rows")[:], np.array(rows))
