"""The committed fixtures: what our code makes from them has not changed, and the coders
reproduce the worked answers (each answer file names its source)."""

from __future__ import annotations

import importlib.util
import json
import pathlib

import numpy as np
import pytest

from atomline.stages.workspace.safety import check_array_metadata
from atomline.stages.kernels.coding import code
from atomline.stages.errors import UnsafeStore

FIXTURES = pathlib.Path(__file__).resolve().parents[2] / "fixtures"


def _make_fixtures():
    spec = importlib.util.spec_from_file_location("make_fixtures", FIXTURES / "make_fixtures.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


make = _make_fixtures()


def _json(path: pathlib.Path):
    return json.loads(path.read_text())


def test_pinned_demo_records_are_what_the_demo_generator_gives():
    X, y = make.load_demo_records()
    assert X.shape == (24, 2048) and X.dtype == np.float32 and y.dtype == np.int64
    gen_X, gen_y = make.demo_records()
    np.testing.assert_array_equal(gen_X, X)
    np.testing.assert_array_equal(gen_y, y)


def test_tiny_workspace_keeps_its_layout_fingerprints_and_ids():
    pinned = _json(FIXTURES / "tiny_workspace.json")
    built = make.tiny_workspace(*make.load_demo_records())
    # Compared piece by piece so that a failure names what changed.
    assert built["records_fingerprint"] == pinned["records_fingerprint"]
    assert built["dict_id"] == pinned["dict_id"]
    assert built["layout_version"] == pinned["layout_version"] and built["root"] == pinned["root"]
    assert sorted(built["nodes"]) == sorted(pinned["nodes"])
    for path, node in pinned["nodes"].items():
        assert built["nodes"][path] == node, path
    assert built == pinned


def test_unsafe_documents_are_the_generated_ones_and_each_is_refused():
    files = sorted((FIXTURES / "unsafe").glob("*.json"))
    made = make.unsafe_documents()
    assert [f.stem for f in files] == sorted(made)
    for f in files:
        fixture = _json(f)
        assert fixture == json.loads(json.dumps(made[f.stem])), f.name
        with pytest.raises(UnsafeStore, match=fixture["refused_because"]):
            check_array_metadata(fixture["document"], f.stem)


def test_omp_reproduces_the_worked_example():
    # Reference: worked by hand (see make_fixtures.py), confirmed by scikit-learn's
    # orthogonal_mp when the fixture was made; agreement to rounding.
    answer = _json(FIXTURES / "answers" / "omp-by-hand.json")
    codes = code(np.asarray(answer["x"]), np.asarray(answer["atoms"]), answer["coder"], **answer["options"])
    np.testing.assert_allclose(codes.dense(), answer["codes"], rtol=0, atol=answer["tolerance"])


@pytest.mark.parametrize("name", ["lasso-orthonormal", "lasso-scikit-learn"])
def test_lasso_coders_reproduce_the_worked_answers(name):
    # Reference: the file's "source" (soft-threshold closed form for an orthonormal
    # dictionary; scikit-learn's coordinate-descent Lasso for the other); tolerance per
    # coder as stored beside the answer (LARS is exact, the proximal coders iterate).
    answer = _json(FIXTURES / "answers" / f"{name}.json")
    assert answer["source"]
    for coder in answer["coders"]:
        options = dict(answer["options"], gap_tol=1e-12, max_iter=100_000) if coder != "lars" \
            else answer["options"]
        codes = code(np.asarray(answer["x"]), np.asarray(answer["atoms"]), coder, **options)
        np.testing.assert_allclose(codes.dense(), answer["codes"], rtol=0,
                                   atol=answer["tolerance"][coder], err_msg=coder)


def test_worked_answers_are_the_generated_ones():
    made = make.worked_answers()
    files = sorted((FIXTURES / "answers").glob("*.json"))
    assert [f.stem for f in files] == sorted(made)
    for f in files:
        stored, fresh = _json(f), json.loads(json.dumps(made[f.stem]))
        assert {k: v for k, v in stored.items() if k not in ("codes", "source")} == \
            {k: v for k, v in fresh.items() if k not in ("codes", "source")}, f.name
        # scikit-learn's solver may move in the last digits between its versions.
        np.testing.assert_allclose(stored["codes"], fresh["codes"], rtol=0, atol=1e-9, err_msg=f.name)
