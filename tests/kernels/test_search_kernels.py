"""Configurations around the shape defaults, the rows of each rung, and the ranking."""

from __future__ import annotations

import numpy as np
import pytest

from atomline.stages.errors import InputError
from atomline.stages.kernels.search import AXES, candidates, configuration, rank, rung_rows
from atomline.stages.kernels.shape_rules import check_settings, default_settings


def _settings_of(config):
    return {k: (tuple(v) if isinstance(v, list) else v) for k, v in config.items()
            if k in ("patch_size", "stride", "regions", "n_atoms", "n_nonzero", "sample_patches",
                     "normalise", "whiten")}


def test_candidates_start_with_the_defaults_and_all_can_work():
    base = default_settings((8, 8), 1000)
    found = candidates(base, (8, 8), 1000, axes=tuple(AXES), budget=40, seed=0)
    assert found[0]["label"] == "defaults"
    assert found[0] == dict(configuration(base), label="defaults")
    assert len(found) == 40
    keys = [repr(sorted((k, v) for k, v in c.items() if k != "label")) for c in found]
    assert len(set(keys)) == len(keys)  # distinct
    for c in found:
        check_settings((8, 8), 1000, **_settings_of(c))  # refuses what cannot work
    labels = {c["label"] for c in found}
    # Every single change that can work on 8×8 images is among them (budget exceeds them).
    assert {"atoms 16", "atoms 64", "learner kmeans", "fista", "regions 1", "mean pooling",
            "whiten on", "normalise off", "patch (2, 2)"} <= labels
    assert any(" + " in label for label in labels)  # pairs fill the rest


def test_changes_that_cannot_work_are_left_out():
    base = default_settings((8, 8), 1000)
    found = candidates(base, (8, 8), 1000, axes=("patch", "pooling"), budget=20, seed=0)
    # An 8×8 patch leaves one position: regions 3×3 cannot be pooled, so "patch (8, 8)"
    # alone is refused by check_settings; twice the regions (6×6) exceed the 5×5 grid.
    assert "patch (8, 8)" not in {c["label"] for c in found}
    assert "regions (6, 6)" not in {c["label"] for c in found}


def test_a_budget_below_the_changes_keeps_a_seeded_choice():
    base = default_settings((8, 8), 1000)
    a = candidates(base, (8, 8), 1000, axes=tuple(AXES), budget=5, seed=0)
    b = candidates(base, (8, 8), 1000, axes=tuple(AXES), budget=5, seed=0)
    c = [candidates(base, (8, 8), 1000, axes=tuple(AXES), budget=5, seed=s) for s in range(1, 6)]
    assert a == b and len(a) == 5 and a[0]["label"] == "defaults"
    assert any([x["label"] for x in a] != [x["label"] for x in other] for other in c)
    with pytest.raises(InputError, match="budget"):
        candidates(base, (8, 8), 1000, axes=tuple(AXES), budget=0, seed=0)
    with pytest.raises(InputError, match="axis"):
        candidates(base, (8, 8), 1000, axes=("colour",), budget=3, seed=0)


def test_rung_rows_are_nested_and_stratified():
    y = np.repeat(np.arange(4), [50, 30, 15, 5])
    sizes = [20, 40, 100]
    found = rung_rows(y, sizes, seed=7)
    assert [f.size for f in found] == sizes
    assert set(found[0]) <= set(found[1]) <= set(found[2])
    assert found[2].tolist() == list(range(100))
    for f in found[:2]:
        counts = np.bincount(y[f], minlength=4)
        # Proportional to the class shares 0.5, 0.3, 0.15, 0.05 within one row per class.
        assert np.all(np.abs(counts - f.size * np.array([0.5, 0.3, 0.15, 0.05])) <= 1.0), counts
    assert [a.tolist() for a in rung_rows(y, sizes, seed=7)] == [a.tolist() for a in found]


def test_rank_prefers_the_furthest_rung_then_score_then_cost():
    trials = [{"rung": 0, "score": 0.99, "cost": 1.0, "position": 0},
              {"rung": 1, "score": 0.90, "cost": 5.0, "position": 1},
              {"rung": 1, "score": 0.90, "cost": 2.0, "position": 2},
              {"rung": 1, "score": 0.95, "cost": 9.0, "position": 3}]
    assert [t["position"] for t in rank(trials)] == [3, 2, 1, 0]
