"""Diagnostics stored with a dictionary, and the entry point's refusals.

References: mutual coherence against scipy.spatial.distance.pdist (cosine distance);
training error of a PCA dictionary against the energy outside the leading singular
directions from numpy.linalg.svd (Eckart–Young).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.spatial.distance import pdist

from atomline.stages.errors import InputError
from atomline.stages.kernels.learning import learn


def _rows(n: int = 2000, d: int = 10, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.standard_normal((n, d)) @ rng.standard_normal((d, d))


def test_coherence_and_plain_json():
    learned = learn(_rows(), 24, "online", coder_options={"n_nonzero": 3}, seed=0)
    expected = float(np.max(np.abs(1 - pdist(learned.atoms, metric="cosine"))))
    assert learned.diagnostics["coherence"] == pytest.approx(expected, rel=1e-12)
    json.dumps(learned.diagnostics)  # plain JSON, storable as Zarr attributes
    json.dumps(learned.params)


def test_pca_training_error_is_the_energy_outside_the_svd_span():
    X = _rows(1500)
    k = 4
    learned = learn(X, k, "pca", center=False, holdout=0)
    sigma = np.linalg.svd(X, compute_uv=False)
    outside = float((sigma[k:] ** 2).sum() / (sigma ** 2).sum())
    assert learned.diagnostics["train_error"] == pytest.approx(outside, rel=1e-9)
    assert learned.diagnostics["n_train_probe"] == 1500


def test_holdout_error_is_measured_on_rows_kept_out():
    rng = np.random.default_rng(1)
    basis = rng.standard_normal((3, 10))
    X = rng.standard_normal((2000, 3)) @ basis  # rows in a 3-D subspace
    outside = rng.standard_normal((200, 10))    # held-out rows mostly off that subspace
    learned = learn(X, 3, "pca", center=False, holdout=outside)
    assert learned.diagnostics["n_holdout"] == 200
    assert learned.diagnostics["train_error"] < 1e-20
    assert learned.diagnostics["holdout_error"] > 0.3  # ~7/10 of the energy is outside
    split = learn(X, 3, "pca", center=False, holdout=0.1)
    assert split.diagnostics["n_holdout"] == 200
    assert split.diagnostics["holdout_error"] < 1e-20


def test_usage_counts_and_objective_trace():
    X = _rows(3000)
    learned = learn(X, 16, "online", coder_options={"n_nonzero": 2}, batch_size=200,
                    n_passes=2, seed=0, holdout=0)
    usage = np.array(learned.diagnostics["usage"])
    trace = learned.diagnostics["objective"]
    assert usage.shape == (16,) and usage.sum() <= 2 * 2 * 3000 and usage.sum() > 2 * 3000
    assert len(trace) == 30
    assert np.mean(trace[-5:]) < np.mean(trace[:2])


def test_entry_point_refusals():
    X = _rows(100)
    with pytest.raises(InputError):
        learn(X, 8, "no-such-method")
    with pytest.raises(InputError):
        learn(X, 8, "online", no_such_option=1)
    with pytest.raises(InputError):
        learn(X, 0, "online")
    bad = X.copy()
    bad[5, 2] = np.nan
    with pytest.raises(InputError):
        learn(bad, 8, "online")
    with pytest.raises(InputError):
        learn(X, 200, "online", holdout=0)
    with pytest.raises(InputError):  # a one-shot stream cannot be read once per pass
        learn(iter([X[:40], X[40:70], X[70:]]), 8, "batch", holdout=0)
