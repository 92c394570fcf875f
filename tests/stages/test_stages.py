"""The four stages as plain functions (no Prefect): chunk protocol, invariance, refusals."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from conftest import store_snapshot

from atomline.stages import encode, evaluate, pool, train
from atomline.stages.errors import FingerprintMismatch, InputError, NotFound
from atomline.stages.workspace import Workspace
from atomline.stages.options import EncodeOptions, EvaluateOptions, PoolOptions, TrainOptions

TRAIN = dict(n_atoms=32, patch_size=64, stride=32, sample_patches=4000, seed=1,
             coder_options={"n_nonzero": 4})


def _workspace(url, records, labels, chunk_rows):
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", records, chunk_rows=chunk_rows)
    ws.add_labels("vib", labels)
    return ws


def _run_all(ws, dict_id, batches):
    prepared = encode.prepare_encode(ws, "vib", dict_id)
    for batch in batches(prepared["pending"]):
        encode.encode_chunks(ws, "vib", dict_id, batch)
    pooled = pool.prepare_pool(ws, "vib", dict_id, options=PoolOptions(regions=2))
    pool.pool_chunks(ws, "vib", dict_id, pooled["pending"])
    codes = ws.output(encode.codes_path(dict_id, "vib")).group
    feats = ws.output(pool.features_path(dict_id, "vib")).group
    return {name: codes[name][:] for name in ("index", "value", "count")} | {"features": feats["values"][:]}


def _chunk_bytes(ws, prefix):
    return {k: v for k, v in store_snapshot(ws).items() if k.startswith(prefix) and "/c/" in k}


@pytest.fixture(scope="module")
def trained(demo_small):
    X, y = demo_small
    ws = _workspace("memory://stages-trained", X, y, chunk_rows=50)
    manifest = train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))
    return ws, manifest["dict_id"]


def test_results_do_not_depend_on_chunk_size(demo_small, trained):
    X, y = demo_small
    ws_a, dict_a = trained
    ws_b = _workspace("memory://stages-chunk-120", X, y, chunk_rows=120)
    dict_b = train.train_dictionary(ws_b, "vib", TrainOptions(**TRAIN))["dict_id"]
    # The sample is drawn by record number, so chunking does not change the dictionary.
    assert dict_a == dict_b
    np.testing.assert_array_equal(ws_a.load_dictionary(dict_a).atoms, ws_b.load_dictionary(dict_b).atoms)
    a = _run_all(ws_a, dict_a, lambda p: [p])
    b = _run_all(ws_b, dict_b, lambda p: [p])
    for name in a:
        np.testing.assert_array_equal(a[name], b[name], err_msg=name)
    assert (a["count"] == 4).mean() > 0.99  # OMP found 4 atoms for (almost) every patch


def test_results_do_not_depend_on_worker_count(demo_small, trained):
    X, y = demo_small
    ws_ref, dict_id = trained
    reference = _run_all(ws_ref, dict_id, lambda p: [p])
    ws = _workspace("memory://stages-workers", X, y, chunk_rows=50)
    train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))
    prepared = encode.prepare_encode(ws, "vib", dict_id)
    batches = [prepared["pending"][i::3] for i in range(3)]  # interleaved, three threads
    with ThreadPoolExecutor(3) as pool_:
        list(pool_.map(lambda b: encode.encode_chunks(ws, "vib", dict_id, b, blas_threads=1), batches))
    got = _run_all(ws, dict_id, lambda p: [p])  # everything is done: only pooling runs
    for name in reference:
        np.testing.assert_array_equal(got[name], reference[name], err_msg=name)


def test_interrupted_encode_resumes_to_the_same_bytes(demo_small, trained):
    X, y = demo_small
    ws_ref, dict_id = trained
    _run_all(ws_ref, dict_id, lambda p: [p])
    ws = _workspace("memory://stages-resume", X, y, chunk_rows=50)
    train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))
    first = encode.prepare_encode(ws, "vib", dict_id)
    encode.encode_chunks(ws, "vib", dict_id, first["pending"][:5])
    again = encode.prepare_encode(ws, "vib", dict_id)
    assert again["pending"] == first["pending"][5:]
    result = encode.encode_chunks(ws, "vib", dict_id, first["pending"])
    assert result["skipped"] == 5 and result["encoded"] == len(first["pending"]) - 5
    prefix = f"codes/{dict_id}/vib"
    assert _chunk_bytes(ws, prefix) == _chunk_bytes(ws_ref, prefix)


def test_outputs_from_other_inputs_are_refused(trained):
    ws, dict_id = trained
    encode.prepare_encode(ws, "vib", dict_id)
    before = store_snapshot(ws)
    with pytest.raises(FingerprintMismatch, match="overwrite"):
        encode.prepare_encode(ws, "vib", dict_id, options=EncodeOptions(coder="omp", coder_options={"n_nonzero": 2}))
    assert store_snapshot(ws) == before


def test_dictionary_for_other_records_is_refused(trained):
    ws, dict_id = trained
    ws.add_records("short", np.zeros((4, 1000), np.float32), overwrite=True)
    before = store_snapshot(ws)
    with pytest.raises(InputError, match="records shaped"):
        encode.prepare_encode(ws, "short", dict_id)
    with pytest.raises(NotFound):
        encode.prepare_encode(ws, "vib", "d-no-such")
    assert store_snapshot(ws) == before


def test_pool_and_evaluate_wait_for_their_inputs(demo_small, memory_url):
    X, y = demo_small
    ws = _workspace(memory_url, X[:200], y[:200], chunk_rows=50)
    dict_id = train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))["dict_id"]
    prepared = encode.prepare_encode(ws, "vib", dict_id)
    encode.encode_chunks(ws, "vib", dict_id, prepared["pending"][:2])
    pooled = pool.prepare_pool(ws, "vib", dict_id)
    with pytest.raises(InputError, match="not encoded yet"):
        pool.pool_chunks(ws, "vib", dict_id, pooled["pending"])
    with pytest.raises(InputError, match="not pooled"):
        evaluate.evaluate_features(ws, "vib", dict_id)


def test_evaluations_are_appended(demo_small, trained):
    ws, dict_id = trained
    _run_all(ws, dict_id, lambda p: [p])
    light = dict(seed=0, learning_curve=(), n_boot=100)
    first = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**light, baselines=("raw",)))
    second = evaluate.evaluate_features(ws, "vib", dict_id, EvaluateOptions(**light, baselines=()))
    history = ws.evaluations()
    assert [h["run_id"] for h in history][-2:] == [first["run_id"], second["run_id"]]
    # Same folds, same classifier: the same score twice.
    assert first["features"] == second["features"]
    assert "raw" in first and "raw" not in second
    conf = ws.evaluation_arrays(first["run_id"])["confusion_features"]
    assert conf.sum() == first["n_rows"]
    assert np.trace(conf) / conf.sum() == pytest.approx(first["features"]["accuracy"])


@pytest.fixture(scope="module")
def coders_ws(demo_small):
    X, y = demo_small
    ws = _workspace("memory://stages-coders", X, y, chunk_rows=100)
    return ws, train.train_dictionary(ws, "vib", TrainOptions(**TRAIN))["dict_id"]


CODERS = [
    ("omp", {"n_nonzero": 4}), ("mp", {"n_nonzero": 4}), ("ormp", {"n_nonzero": 4}),
    ("cosamp", {"n_nonzero": 4}), ("lars", {"lam": 0.5, "max_nonzero": 8}),
    ("fista", {"lam": 0.5, "max_nonzero": 8}), ("ista", {"lam": 0.5, "max_nonzero": 8}),
    ("threshold", {"alpha": 0.5}), ("threshold", {"alpha": 0.5, "split_sign": True}),
    ("triangle", {}), ("hard", {}), ("block-omp", {"group_size": 4, "n_groups": 2}),
]


@pytest.mark.parametrize("coder, options", CODERS, ids=[f"{c}-{len(o)}{'s' if o.get('split_sign') else ''}" for c, o in CODERS])
def test_every_coder_runs_through_encode_and_pool(coders_ws, coder, options):
    ws, dict_id = coders_ws
    k = ws.load_dictionary(dict_id).atoms.shape[0]
    prepared = encode.prepare_encode(ws, "vib", dict_id, overwrite=True, options=EncodeOptions(coder=coder, coder_options=options))
    encode.encode_chunks(ws, "vib", dict_id, prepared["pending"])
    codes = ws.output(encode.codes_path(dict_id, "vib"))
    outputs = 2 * k if options.get("split_sign") else k
    assert codes.attrs["n_atoms"] == outputs and codes.attrs["params"]["coder"] == coder
    count, index = codes.group["count"][:], codes.group["index"][:]
    assert count.max() <= prepared["width"] and count.mean() > 0
    assert index.max() < outputs
    pooled = pool.prepare_pool(ws, "vib", dict_id, overwrite=True, options=PoolOptions(regions=2))
    pool.pool_chunks(ws, "vib", dict_id, pooled["pending"])
    feats = ws.output(pool.features_path(dict_id, "vib")).group["values"][:]
    assert feats.shape == (600, 2 * 2 * outputs) and np.isfinite(feats).all()
    assert (feats.max(axis=0) > 0).sum() > outputs // 4  # many atoms show up somewhere


def test_learned_encoder_is_stored_with_its_dictionary_and_used_by_encode(coders_ws):
    from atomline.stages.kernels.coding import LearnedEncoder, code
    from atomline.stages.kernels.prep import Normaliser, PatchGeometry

    ws, dict_id = coders_ws
    made = train.train_encoder(ws, "vib", dict_id, name="fast", target="fista",
                               target_options={"lam": 0.5}, sample_patches=1500,
                               fit_options={"n_steps": 150})
    info = made["info"]
    assert info["relative_error_final"] < info["relative_error_initial"]
    prepared = encode.prepare_encode(ws, "vib", dict_id, overwrite=True, options=EncodeOptions(coder="learned", coder_options={"encoder": "fast", "max_nonzero": 8}))
    assert prepared["width"] == 8
    encode.encode_chunks(ws, "vib", dict_id, prepared["pending"][:1])
    out = ws.output(encode.codes_path(dict_id, "vib"))
    assert out.attrs["params"]["encoder_fingerprint"] == made["fingerprint"]
    # Same codes as the kernel with the encoder rebuilt from the store, on the first chunk.
    stored = ws.load_dictionary(dict_id)
    attrs, arrays = ws.load_encoder(dict_id, "fast")
    geo = PatchGeometry.from_attrs(stored.attrs["geometry"])
    rows = geo.extract(np.asarray(ws.records("vib")[:100]))
    patches = Normaliser.from_stored(stored.attrs["preprocessing"], stored.arrays).apply(rows)
    direct = code(patches, stored.atoms.astype(np.float32), "learned",
                  encoder=LearnedEncoder.from_stored(attrs["encoder"], arrays), max_nonzero=8)
    n = patches.shape[0]
    np.testing.assert_array_equal(out.group["count"][:n], direct.count)
    np.testing.assert_array_equal(out.group["value"][:n], direct.value.astype(np.float32))
    with pytest.raises(InputError, match="encoder"):
        encode.prepare_encode(ws, "vib", dict_id, overwrite=True, options=EncodeOptions(coder="learned", coder_options={}))
    with pytest.raises(NotFound):
        encode.prepare_encode(ws, "vib", dict_id, overwrite=True, options=EncodeOptions(coder="learned", coder_options={"encoder": "missing"}))
