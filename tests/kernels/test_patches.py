"""Patch extraction and per-patch normalisation."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.feature_extraction.image import extract_patches_2d

from atomline.stages.errors import InputError
from atomline.stages.kernels.prep import Normaliser, PatchGeometry


@pytest.mark.parametrize("channels", [None, 3])
def test_2d_patches_match_scikit_learn(channels):
    # Outside reference: scikit-learn's extract_patches_2d (all patches, stride 1,
    # raster order, each patch flattened row-major over (h, w[, C])).
    rng = np.random.default_rng(0)
    shape = (2, 9, 7) if channels is None else (2, 9, 7, channels)
    images = rng.standard_normal(shape)
    geo = PatchGeometry.for_records(shape[1:], size=(4, 3), stride=1)
    ours = geo.extract(images).reshape(2, geo.patches_per_record, -1)
    for i in range(2):
        ref = extract_patches_2d(images[i], (4, 3)).reshape(geo.patches_per_record, -1)
        np.testing.assert_array_equal(ours[i], ref)


def test_strided_2d_patches_are_the_reference_patches_at_those_origins():
    # Same reference; with a stride, ours is the subset of its patches whose origins lie on
    # the stride grid.
    images = np.random.default_rng(1).standard_normal((1, 10, 11))
    geo = PatchGeometry.for_records((10, 11), size=4, stride=(3, 2))
    assert geo.grid == (3, 4)
    ref = extract_patches_2d(images[0], (4, 4)).reshape(7, 8, 16)  # (10-4+1, 11-4+1)
    np.testing.assert_array_equal(geo.extract(images), ref[::3, ::2].reshape(-1, 16))


def test_1d_patches_by_definition():
    signals = np.arange(2 * 10, dtype=float).reshape(2, 10)
    geo = PatchGeometry.for_records((10,), size=4, stride=3)
    assert geo.grid == (3,) and geo.patches_per_record == 3
    expected = np.array([signals[i, s : s + 4] for i in range(2) for s in (0, 3, 6)])
    np.testing.assert_array_equal(geo.extract(signals), expected)


def test_vectors_are_one_patch_each():
    X = np.random.default_rng(2).standard_normal((5, 7))
    geo = PatchGeometry.for_records((7,))
    assert geo.patches_per_record == 1
    np.testing.assert_array_equal(geo.extract(X), X)


def test_geometry_round_trips_and_rejects_bad_sizes():
    geo = PatchGeometry.for_records((8, 8, 3), size=4, stride=2)
    assert PatchGeometry.from_attrs(geo.to_attrs()) == geo
    assert geo.n_features == 48
    with pytest.raises(InputError, match="patch size"):
        PatchGeometry.for_records((8,), size=9)
    with pytest.raises(InputError, match="stride"):
        PatchGeometry.for_records((8,), size=2, stride=0)
    with pytest.raises(InputError, match="rows of shape"):
        geo.extract(np.zeros((1, 8, 8)))


def test_normaliser_formula():
    rng = np.random.default_rng(3)
    X = rng.standard_normal((200, 16)) * rng.uniform(0.1, 5, (200, 1)) + 3.0
    norm = Normaliser(contrast_floor=0.1).fit(X)
    centred = X - X.mean(axis=1, keepdims=True)
    eps = 0.1 * centred.var(axis=1).mean()
    assert norm.eps == pytest.approx(eps)
    expected = centred / np.sqrt(centred.var(axis=1, keepdims=True) + eps)
    # atol: centring cancels to ~1e-4 in places, where 1e-16 of summation order shows.
    np.testing.assert_allclose(norm.apply(X), expected, rtol=1e-12, atol=1e-14)
    # Constant rows stay finite (zero) instead of dividing by zero.
    assert np.all(norm.apply(np.full((2, 16), 7.0)) == 0)
    assert Normaliser.from_stored(norm.to_attrs(), norm.arrays()) == norm
