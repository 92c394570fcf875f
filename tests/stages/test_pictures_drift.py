"""Pictures rendered to PNG and stored in the workspace; drift of appended rows."""

from __future__ import annotations

import io

import numpy as np
import pytest
from matplotlib.image import imread

from atomline.stages import encode, evaluate
from atomline.stages import report as pictures
from atomline.stages.drift import compare_drift, detect_drift, measure_fit
from atomline.stages.errors import InputError
from atomline.stages.kernels.prep import PatchGeometry
from atomline.stages.options import DriftOptions, EncodeOptions, EvaluateOptions

HEIGHT, WIDTH = pictures.SIZE[1], pictures.SIZE[0]


def _image(png: bytes) -> np.ndarray:
    # Read back with matplotlib's own PNG reader (an independent decoder path: Pillow).
    return imread(io.BytesIO(png), format="png")


def _assert_picture(png: bytes) -> np.ndarray:
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    img = _image(png)
    assert img.shape[:2] == (HEIGHT, WIDTH)
    # Non-empty: many distinct colours, and not a blank white canvas.
    rgb = img[..., :3].reshape(-1, 3)
    assert rgb.std() > 0.05
    packed = (rgb * 255).astype(np.int64) @ np.array([65536, 256, 1])
    assert np.unique(packed).size > 20
    return img


@pytest.fixture(scope="module")
def digits_report(digits_workspace):
    ws, dict_id = digits_workspace
    ev = evaluate.evaluate_features(ws, "digits", dict_id, tag="pictures", options=EvaluateOptions(baselines=("raw",), learning_curve=(0.2,), n_boot=200))
    paths = pictures.render_report(ws, ev["run_id"], class_names=[f"digit {i}" for i in range(10)])
    return ws, ev, paths


def test_every_picture_is_a_png_of_the_expected_size(digits_report):
    ws, ev, paths = digits_report
    names = [p.rsplit("/", 1)[1] for p in paths]
    assert names == ["atoms", "usage", "history", "confusion", "learning_curve"]
    listed = {p["path"]: p for p in ws.pictures()}
    for path in paths:
        assert listed[path]["width"] == WIDTH and listed[path]["media_type"] == "image/png"
        _assert_picture(ws.picture(path))
    assert ws.summary()["pictures"][0]["path"] == paths[0]


def test_atom_tiles_show_the_atoms(digits_report, digits_workspace):
    # The atoms are drawn as grey tiles: the picture holds dark and bright pixels, and
    # mid-grey (an atom's zero) is common, as in any unit-norm, zero-mean patch.
    ws, ev, paths = digits_report
    grey = _image(ws.picture(paths[0]))[..., :3].mean(axis=2)
    inner = grey[HEIGHT // 8: -HEIGHT // 8, WIDTH // 4: -WIDTH // 4]
    assert inner.min() < 0.2 and inner.max() > 0.8
    assert np.mean(np.abs(inner - 0.5) < 0.15) > 0.05
    usage = pictures.atom_usage(ws, digits_workspace[1], "digits")
    codes = ws.output(f"codes/{digits_workspace[1]}/digits").group["count"][:]
    assert usage.sum() == codes.sum()  # every nonzero coefficient counted once


def test_waveform_atoms_and_single_pictures():
    rng = np.random.default_rng(0)
    geometry = PatchGeometry.for_records((256,), 32, 16)
    atoms = rng.standard_normal((20, 32))
    _assert_picture(pictures.atoms_png(atoms, geometry))
    _assert_picture(pictures.usage_png(rng.integers(0, 50, 20)))
    _assert_picture(pictures.history_png([{"label": f"run {i}", "features": 0.8 + 0.01 * i, "raw": 0.3,
                                           "promoted": i % 2 == 0} for i in range(5)]))
    _assert_picture(pictures.confusion_png(rng.integers(0, 30, (4, 4)), list("abcd")))
    _assert_picture(pictures.curve_png({"train_rows": [10, 50, 200], "features": [0.5, 0.7, 0.8],
                                        "raw": [0.3, 0.3, 0.35]}))
    with pytest.raises(InputError, match="atoms"):
        pictures.atoms_png(atoms[:, :10], geometry)


def test_pictures_are_append_only(digits_report):
    ws, ev, paths = digits_report
    with pytest.raises(Exception, match="existing"):
        ws.save_picture(ev["run_id"], "atoms", ws.picture(paths[0]), {})
    with pytest.raises(InputError, match="PNG"):
        ws.save_picture(ev["run_id"], "other", b"GIF89a", {})


# ------------------------------------------------------------------------------- drift
@pytest.fixture(scope="module")
def drifting(digits_workspace):
    """The digits workspace's dictionary; records 0..1199 as seen, then two kinds of
    'new' rows: more digits (no drift) and digits overlaid with strong noise (drift)."""

    ws, dict_id = digits_workspace
    images = ws.records("digits")[:]
    rng = np.random.default_rng(0)
    noisy = images[1200:] + rng.normal(0, 6.0, images[1200:].shape).astype(np.float32)
    ws.add_records("mixed", np.concatenate([images[:1200], noisy]), chunk_rows=300)
    return ws, dict_id


def test_new_rows_like_the_old_do_not_drift(digits_workspace):
    ws, dict_id = digits_workspace
    result = detect_drift(ws, "digits", dict_id, DriftOptions(drift_since=1200, drift_threshold=0.2), max_patches=8000)
    assert result["reference"]["rows"] == [0, 1200] and result["new"]["rows"] == [1200, 1797]
    assert abs(result["error_change"]) < 0.2 and not result["drifted"]
    assert result["new"]["nonzeros"] == pytest.approx(3.0, abs=0.01)  # OMP with n_nonzero=3


def test_noisy_new_rows_drift(drifting):
    ws, dict_id = drifting
    result = detect_drift(ws, "mixed", dict_id, DriftOptions(drift_since=1200, drift_threshold=0.2), max_patches=8000)
    # White noise is spread over every direction: 3 atoms of 16-pixel patches capture
    # far less of its energy, so the relative error grows a lot.
    assert result["error_change"] > 0.5 and result["drifted"]
    fit = measure_fit(ws, "mixed", dict_id, slice(1200, None), max_patches=500)
    assert fit["patches"] == 500 and 0 < fit["error"] < 1
    with pytest.raises(InputError, match="range"):
        measure_fit(ws, "mixed", dict_id, slice(1797, None))


def test_drift_codes_with_the_coder_the_codes_were_made_with(digits_workspace):
    ws, dict_id = digits_workspace
    ws.add_records("recoded", ws.records("digits")[:600], chunk_rows=300)
    # No codes yet: the dictionary's own coder (OMP with 3 nonzeros).
    assert measure_fit(ws, "recoded", dict_id, slice(0, None), max_patches=500)["nonzeros"] == pytest.approx(3.0, abs=0.01)
    encode.prepare_encode(ws, "recoded", dict_id, EncodeOptions(coder_options={"n_nonzero": 1}))
    assert ws.output(f"codes/{dict_id}/recoded").attrs["params"]["coder_options"]["n_nonzero"] == 1
    # The records' codes were made with 1 nonzero: drift measures what encode produces.
    assert measure_fit(ws, "recoded", dict_id, slice(0, None), max_patches=500)["nonzeros"] == pytest.approx(1.0, abs=0.01)


def test_drift_rule():
    ref = {"error": 0.2, "nonzeros": 4.0}
    assert not compare_drift({"error": 0.23, "nonzeros": 4.2}, ref, 0.2)["drifted"]
    assert compare_drift({"error": 0.25, "nonzeros": 4.0}, ref, 0.2)["drifted"]
    assert compare_drift({"error": 0.2, "nonzeros": 3.0}, ref, 0.2)["drifted"]


def test_history_and_curve_show_the_best_baseline_beside_raw(digits_workspace):
    # scikit-learn's digits (the conftest fixture): every baseline evaluated, a learning curve.
    ws, dict_id = digits_workspace
    ev = evaluate.evaluate_features(ws, "digits", dict_id, tag="baselines-shown", options=EvaluateOptions(
        max_rows=400, folds=3, learning_curve=(0.3,), n_boot=100))
    rp, pca = ev["random_patches"]["accuracy"], ev["pca"]["accuracy"]
    best = "pca" if pca > rp else "random_patches"
    point = [p for p in pictures.history_points(ws, "digits") if p["label"].endswith(dict_id[:8])][-1]
    assert point["baseline"] == max(rp, pca) and point["baseline_name"] == best
    assert point["raw"] == ev["raw"]["accuracy"]
    lines = pictures.history_series([point, {"label": "no baselines", "features": 0.5}])
    assert lines["baseline"][0] == max(rp, pca) and np.isnan(lines["baseline"][1])
    # The learning curve holds every set, and the picture draws the best baseline beside raw;
    # its last point is the full training share, the fold mean of the main result.
    curve = ev["learning_curve"]
    series = pictures.curve_series(curve, best)
    assert list(series) == ["features", "raw", f"best baseline: {best}"]
    assert series[f"best baseline: {best}"][-1] == pytest.approx(
        np.mean(ev[best]["fold_accuracy"]))
    _assert_picture(pictures.curve_png(curve, baseline=best))
    paths = pictures.render_report(ws, ev["run_id"])
    assert [p.rsplit("/", 1)[1] for p in paths][-1] == "learning_curve"
