"""The nightly gate against the raw records: a candidate whose features lose to a classifier on
the raw records is not promoted, on the first run too, and the reports say which comparison failed."""

from __future__ import annotations

import uuid

import numpy as np
import pytest

from atomline.flows import STATE_NAMES, nightly_flow
from atomline.flows.cli.reports import _describe_nightly
from atomline.stages.options import EvaluateOptions, PoolOptions, RunnerOptions, TrainOptions
from atomline.stages.workspace import Workspace

pytestmark = [pytest.mark.usefixtures("prefect_harness"), pytest.mark.slow]


@pytest.fixture(scope="module")
def offset_archive():
    """Two classes that differ only in their mean: every patch loses its mean before coding
    (the default preprocessing), so pooled codes cannot tell the classes apart and the raw
    records can."""
    rng = np.random.default_rng(7)
    y = rng.permutation(np.arange(240) % 2)
    X = (rng.standard_normal((240, 256)) + 1.0 * y[:, None]).astype(np.float32)
    url = f"memory://below-raw-{uuid.uuid4().hex}"
    ws = Workspace.open(url, create=True)
    ws.add_records("vib", X, chunk_rows=60)
    ws.add_labels("vib", y)
    return url


def test_features_that_lose_to_raw_are_not_promoted_on_the_first_run(offset_archive):
    state = nightly_flow(
        offset_archive, "vib", return_state=True,
        train=TrainOptions(n_atoms=16, patch_size=32, stride=16, sample_patches=2000,
                           coder_options={"n_nonzero": 3}),
        pool=PoolOptions(regions=2), runner=RunnerOptions(workers=2),
        # No baselines asked for: the gate adds the raw records itself.
        evaluate=EvaluateOptions(baselines=(), learning_curve=(), folds=3, n_boot=300))
    report = state.result()
    assert state.is_completed() and state.name == STATE_NAMES["below_raw"] == "BelowRaw"
    assert state.message.startswith("below_raw:")
    cand = report["candidate"]
    assert cand["raw"]["accuracy"] > 0.9 > cand["features"]["accuracy"]
    refs = report["references"]
    assert refs["outcome"] == "below_raw" and refs["raw"]["difference"] < 0
    assert refs["raw"]["a"] == cand["features"]["accuracy"] and refs["raw"]["b"] == cand["raw"]["accuracy"]
    ws = Workspace.open(offset_archive)
    assert ws.promoted is None and report["promoted_id"] is None
    decision = ws.decisions()[-1]
    assert decision["outcome"] == "below_raw" and decision["promoted"] is False
    assert decision["references"]["raw"] == refs["raw"]
    text = _describe_nightly(report)
    assert "BELOW_RAW" in text and "against the raw records on accuracy" in text and "NOT beaten" in text
