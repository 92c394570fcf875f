"""Every command with no option but the workspace and the records, on each record shape."""

from __future__ import annotations

import json

import numpy as np
import pytest

from atomline.flows import cli

SHAPES = [pytest.param((8,), id="short-8"), pytest.param((40,), id="short-40"),
          pytest.param((8, 8), id="image-8x8")]


def _cli(capsys, *argv: str):
    status = cli.main(list(argv))
    out, err = capsys.readouterr()
    return status, out, err


@pytest.mark.parametrize("shape", SHAPES)
def test_nightly_with_no_option_ends_well(shape, tmp_path, capsys, prefect_harness):
    # The old defaults (the whole record as one patch, then 4 pooled regions) refused 40-sample
    # signals and 8 × 8 images before the run.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(40, *shape)).astype(np.float32)
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", np.arange(40) % 2)
    url = str(tmp_path / "ws")
    assert _cli(capsys, "add-records", url, "r", str(tmp_path / "x.npy"))[0] == 0
    assert _cli(capsys, "add-labels", url, "r", str(tmp_path / "y.npy"))[0] == 0
    status, out, err = _cli(capsys, "nightly", url, "r", "--json")
    assert status == 0, err
    report = json.loads(out)
    # Noise records with arbitrary labels: the learned features cannot beat a classifier on
    # the raw records (40 rows give an interval far wider than the tolerance), so the run ends
    # with a decision that promotes nothing, and says which comparison failed.
    assert report["outcome"] == "below_raw" and report["promoted_id"] is None
    assert report["references"]["outcome"] == "below_raw"
    settings = report["train"]["settings"]
    assert settings["kind"] == ("signals" if len(shape) == 1 else "images")
    assert report["train"]["geometry"]["size"] == ([4] if shape == (8,) else [8] if shape == (40,) else [4, 4])
    assert settings["reasons"]["patch_size"].startswith("Patches of ")
