"""Normaliser: per-patch steps (default), dataset mean removal, ZCA whitening.

References: ZCA whitening ``M = C^(-1/2)`` (Bell & Sejnowski, Vision Research 1997),
checked against scipy.linalg.fractional_matrix_power; with ε the whitened covariance is
``C (C + εI)^(-1)``, checked against numpy.linalg.solve. The regularised ε and the
contrast floor of 0.1 are rules of thumb of the trade (Coates & Ng, 2011), not derived.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.linalg import fractional_matrix_power

from atomline.stages.errors import InputError
from atomline.stages.kernels.prep import Normaliser


def _correlated(n: int = 4000, d: int = 6, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    mix = rng.standard_normal((d, d))
    return rng.standard_normal((n, d)) @ mix + rng.standard_normal(d) * 3


def test_default_is_per_patch_mean_and_contrast_as_before():
    X = _correlated()
    centred = X - X.mean(axis=1, keepdims=True)
    eps = 0.1 * centred.var(axis=1).mean()
    expected = centred / np.sqrt(centred.var(axis=1, keepdims=True) + eps)
    fitted = Normaliser().fit(X)
    np.testing.assert_allclose(fitted.apply(X), expected, rtol=1e-12)
    assert fitted.arrays() == {}


def test_zca_without_epsilon_is_inverse_square_root_of_covariance():
    X = _correlated()
    norm = Normaliser(remove_mean=False, contrast=False, whiten=True, whiten_eps=0.0).fit(X)
    C = np.cov(X.T)
    np.testing.assert_allclose(norm.whitening, fractional_matrix_power(C, -0.5).real,
                               rtol=1e-8, atol=1e-10)
    Y = norm.apply(X)
    np.testing.assert_allclose(np.cov(Y.T), np.eye(6), atol=1e-8)
    np.testing.assert_allclose(Y.mean(axis=0), 0, atol=1e-10)


def test_zca_with_epsilon_shrinks_small_directions():
    X = _correlated()
    eps = 0.5
    Y = Normaliser(remove_mean=False, contrast=False, whiten=True, whiten_eps=eps).fit(X).apply(X)
    C = np.cov(X.T)
    np.testing.assert_allclose(np.cov(Y.T), np.linalg.solve(C + eps * np.eye(6), C).T,
                               atol=1e-8)


def test_dataset_mean_removal_only():
    X = _correlated()
    norm = Normaliser(remove_mean=False, contrast=False, center=True).fit(X)
    np.testing.assert_allclose(norm.apply(X), X - X.mean(axis=0), atol=1e-12)
    assert set(norm.arrays()) == {"mean"}


def test_stored_form_round_trips_and_rows_are_independent():
    X = _correlated()
    norm = Normaliser(whiten=True, whiten_eps=0.1).fit(X)
    attrs = json.loads(json.dumps(norm.to_attrs()))  # must be plain JSON
    again = Normaliser.from_stored(attrs, {k: v.copy() for k, v in norm.arrays().items()})
    np.testing.assert_array_equal(again.apply(X), norm.apply(X))
    halves = np.concatenate([norm.apply(X[:1234]), norm.apply(X[1234:])])
    np.testing.assert_allclose(halves, norm.apply(X), rtol=1e-12, atol=1e-12)
    out32 = norm.apply(X.astype(np.float32))
    assert out32.dtype == np.float32
    np.testing.assert_allclose(out32, norm.apply(X), rtol=1e-3, atol=1e-4)


def test_unfitted_or_incomplete_whitening_is_refused():
    X = _correlated()
    with pytest.raises(InputError):
        Normaliser(whiten=True).apply(X)
    fitted = Normaliser(whiten=True).fit(X)
    with pytest.raises(InputError):
        Normaliser.from_stored(fitted.to_attrs(), {"mean": fitted.mean})
    with pytest.raises(InputError):  # per-patch mean removal leaves a rank-deficient covariance
        Normaliser(whiten=True, whiten_eps=0.0).fit(X)
