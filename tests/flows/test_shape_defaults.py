"""Every command with no option but the workspace and the records, on each record shape.

The values the user leaves out are chosen from the records' shape (``stages/settings.py``);
these runs check that each supported shape gets a configuration that works end to end.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from prefect.client.orchestration import get_client
from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey

from atomline.flows import cli
from atomline.flows.artifacts import SCREENING, artifact_key
from atomline.flows.cli.reports import _describe_nightly

SHAPES = [
    pytest.param((20,), "vectors", 40, id="vectors-20"),
    pytest.param((8,), None, 40, id="signal-8"),
    pytest.param((40,), None, 40, id="signal-40"),
    pytest.param((20_000,), None, 24, id="signal-20000", marks=pytest.mark.slow),
    pytest.param((8, 8), None, 40, id="image-8x8"),
    pytest.param((256, 256), None, 24, id="image-256x256", marks=pytest.mark.slow),
    pytest.param((32, 32, 3), None, 40, id="image-32x32x3"),
]


def _cli(capsys, *argv: str) -> dict:
    status = cli.main([*argv, "--json"])
    out, err = capsys.readouterr()
    assert status == 0, f"atomline {' '.join(argv[:1])} exited {status}: {err[-2000:]}"
    return json.loads(out)


def _summaries(records: str) -> list[str]:
    with get_client(sync_client=True) as client:
        found = client.read_artifacts(artifact_filter=ArtifactFilter(
            key=ArtifactFilterKey(any_=[artifact_key(records, "summary")])))
    return [a.data for a in found]


def _records(shape, n, seed=0):
    """Two classes that differ in a bump's position, on noise (so features can tell them)."""
    rng = np.random.default_rng(seed)
    y = np.arange(n) % 2
    X = rng.normal(scale=0.5, size=(n, *shape)).astype(np.float32)
    first = shape[0]
    for i, label in enumerate(y):
        start = (first // 4) if label == 0 else (first // 2)
        X[i, start:start + max(1, first // 8)] += 3.0
    return X, y


@pytest.mark.usefixtures("prefect_harness")
@pytest.mark.parametrize("shape, kind, n", SHAPES)
def test_every_command_with_no_option_ends_well(shape, kind, n, tmp_path, capsys):
    # The old defaults (the whole record as one patch, then 4 pooled regions) refused 8- and
    # 40-sample signals and 8 × 8 images before the run.
    X, y = _records(shape, n)
    np.save(tmp_path / "x.npy", X)
    np.save(tmp_path / "y.npy", y)
    url = str(tmp_path / "ws")
    name = f"shape-{'x'.join(map(str, shape))}{'-vectors' if kind else ''}"  # its own artifact key
    added = _cli(capsys, "add-records", url, name, str(tmp_path / "x.npy"),
                 *(["--vectors"] if kind == "vectors" else []))
    expected_kind = kind or ("signals" if len(shape) == 1 else "images")
    assert added["kind"] == expected_kind and added["shape"] == [n, *shape]
    _cli(capsys, "add-labels", url, name, str(tmp_path / "y.npy"))

    trained = _cli(capsys, "train", url, name)
    settings = trained["settings"]
    assert settings["kind"] == expected_kind
    assert set(settings["reasons"]) >= {"patch_size", "stride", "n_atoms", "sample_patches",
                                        "regions", "preprocessing"}
    size = trained["geometry"]["size"]
    if kind == "vectors":
        assert size == [shape[0]] and settings["regions"] == [1]
    else:
        assert all(1 <= s <= e // 2 for s, e in zip(size, shape))  # several positions per axis

    # Nothing is promoted before a nightly run: the other commands name the trained dictionary.
    dictionary = ["--dictionary", trained["dict_id"]]
    encoded = _cli(capsys, "encode", url, name, *dictionary)
    pooled = _cli(capsys, "pool", url, name, *dictionary)
    assert encoded["encoded"] >= 1 and pooled["pooled"] == encoded["encoded"]
    assert pooled["regions"] == settings["regions"]
    evaluation = _cli(capsys, "evaluate", url, name, *dictionary)
    assert evaluation["dict_id"] == trained["dict_id"] and evaluation["n_rows"] == n

    report = _cli(capsys, "nightly", url, name)
    # The same options give the same dictionary; it is promoted only if its features beat the
    # raw records (the gate), which a few atoms from 24-40 rows need not do.
    assert report["candidate_id"] == trained["dict_id"]
    assert report["outcome"] in ("first", "below_raw")
    assert report["promoted_id"] == (trained["dict_id"] if report["outcome"] == "first" else None)
    assert report["candidate"]["features"] == evaluation["features"]
    assert report["train"]["settings"] == settings
    assert report["pool"]["regions"] == settings["regions"]
    # The chosen values and their reasons in the text report and the markdown artifact, with
    # the screening notice.
    reason = settings["reasons"]["patch_size"]
    text = _describe_nightly(report)
    assert f"  patch_size: {reason}" in text and f"  regions: {report['pool']['regions_reason']}" in text
    assert text.endswith(SCREENING)
    assert any(f"- patch_size: {reason}" in md and SCREENING in md for md in _summaries(name))
    # The classes differ in where a bump sits: features from defaults that work do better
    # than chance (0.5) on them; a dictionary of a few atoms from 24-40 rows is no more.
    if n >= 40:
        # With 24 records a fold scores about five of them, so a score says nothing; the
        # large shapes (few records, to keep the run short) check that the defaults run.
        assert report["candidate"]["features"]["accuracy"] >= 0.6
    assert report["pool"]["n_features"] == 2 * np.prod(settings["regions"]) * trained["n_atoms"]
