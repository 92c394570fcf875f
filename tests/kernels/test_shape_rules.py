"""Settings derived from the records' shape: always valid, refusals that name the fix."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from sklearn.datasets import load_digits
from sklearn.model_selection import StratifiedKFold, cross_val_score
from sklearn.pipeline import make_pipeline
from threadpoolctl import threadpool_limits

from atomline.stages.checks import check_regions
from atomline.stages.errors import InputError
from atomline.stages.estimator import SparseCodePooler
from atomline.stages.evaluate import make_classifier
from atomline.stages.kernels.prep import Normaliser, PatchGeometry
from atomline.stages.kernels.shape_rules import SETTING_NAMES, check_settings, default_settings
from atomline.stages.pool import region_of_patches

signals = st.tuples(st.integers(8, 100_000))
images = st.tuples(st.integers(8, 512), st.integers(8, 512))
colour_images = st.tuples(st.integers(8, 512), st.integers(8, 512), st.sampled_from([1, 3, 4]))
counts = st.integers(2, 1_000_000)


def assert_valid(shape, n, s):
    """What the stages need of a configuration, checked with the stages' own code."""
    geo = PatchGeometry.for_records(shape, s.patch_size, s.stride)
    assert geo.grid == s.grid
    assert geo.n_features == s.patch_dimension
    assert check_regions(geo.grid, s.regions) == s.regions
    available = n * geo.patches_per_record
    assert 1 <= s.n_atoms <= s.sample_patches <= available
    assert 1 <= s.n_nonzero <= min(s.n_atoms, geo.n_features)
    # Rules of thumb the defaults promise: atoms at most 4× the patch dimension; never more
    # than 1,024 patch positions per record.
    assert s.n_atoms <= 4 * geo.n_features
    assert geo.patches_per_record <= 1024
    assert set(s.reasons) == set(SETTING_NAMES) and all(s.reasons.values())
    # Completing the defaults' own values changes nothing: the two functions agree.
    assert check_settings(shape, n, vectors=s.kind == "vectors", **s.values()) == s


@settings(max_examples=150, deadline=None)
@given(st.one_of(signals, images, colour_images), counts)
def test_every_supported_shape_gets_a_configuration_the_stages_accept(shape, n):
    assert_valid(shape, n, default_settings(shape, n))


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 4096), counts)
def test_vectors_are_one_patch_and_one_region(d, n):
    s = default_settings((d,), n, vectors=True)
    assert (s.kind, s.patch_size, s.stride, s.regions) == ("vectors", None, None, (1,))
    assert_valid((d,), n, s)
    assert PatchGeometry.for_records((d,)).patches_per_record == 1


def test_a_rank_one_record_is_a_signal_unless_the_caller_says_vectors():
    assert default_settings((2048,), 100).kind == "signals"
    assert default_settings((2048,), 100, vectors=True).kind == "vectors"


@pytest.mark.parametrize("shape, n", [((8,), 2), ((24,), 67), ((150,), 50), ((100_000,), 2),
                                      ((8, 8), 2), ((8, 8, 3), 5), ((9, 40), 3), ((12,), 4)])
def test_the_defaults_run_through_the_in_memory_chain(shape, n):
    # The shortest and longest records, the fewest rows: fit and transform end to end.
    s = default_settings(shape, n)
    records = np.random.default_rng(0).standard_normal((n, *shape))
    model = SparseCodePooler(n_atoms=s.n_atoms, record_shape=shape, patch_size=s.patch_size,
                             stride=s.stride, regions=s.regions, n_nonzero=s.n_nonzero,
                             sample_patches=s.sample_patches, seed=0)
    features = model.fit_transform(records.reshape(n, -1))
    _, n_regions = region_of_patches(s.grid, s.regions)
    assert features.shape == (n, 2 * n_regions * s.n_atoms)
    assert np.isfinite(features).all() and np.abs(features).sum() > 0


def test_the_chosen_preprocessing_fits_on_the_default_patches():
    s = default_settings((64,), 30, vectors=True)
    assert s.preprocessing() == {"remove_mean": False, "contrast": False, "whiten": True}
    rows = np.random.default_rng(1).standard_normal((30, 64)) * np.linspace(0.1, 100, 64)
    fitted = Normaliser(**s.preprocessing()).fit(rows)
    out = fitted.apply(rows)
    # Whitening centres the columns (and equalises their scales up to whiten_eps).
    np.testing.assert_allclose(out.mean(axis=0), 0, atol=1e-9)


def test_short_signals_and_small_images_no_longer_fail_with_the_nightly_regions():
    # The failures these rules replace: the whole record as one patch, pooled into 4 regions.
    with pytest.raises(InputError):
        check_regions(PatchGeometry.for_records((24,)).grid, 4)
    for shape in [(24,), (8,), (8, 8)]:
        s = default_settings(shape, 10)
        assert all(r >= 2 for r in s.regions)  # still pooled by position, within the grid
        assert_valid(shape, 10, s)


@pytest.mark.parametrize("shape, n, given, names", [
    ((24,), 100, {"patch_size": 24, "regions": 4},
     ["regions", "regions 4 on a grid of 1 position", "use regions 1", "patch size ≤ 21"]),
    ((24,), 100, {"patch_size": 8, "stride": 4, "regions": 6},
     ["regions", "use regions 5", "stride ≤ 3 with patch size 8"]),
    ((24,), 100, {"patch_size": 30}, ["patch_size", "Use patch_size ≤ 24"]),
    ((24,), 100, {"stride": 0}, ["stride", "stride 1 or more"]),
    ((24,), 3, {"n_atoms": 100}, ["n_atoms", "the 51 patches the 3 records hold", "n_atoms ≤ 51"]),
    ((24,), 100, {"n_atoms": 64, "sample_patches": 32},
     ["sample_patches", "sample_patches ≥ 64 or n_atoms ≤ 32"]),
    ((24,), 100, {"n_nonzero": 30}, ["n_nonzero", "n_nonzero ≤ 8"]),
    ((24,), 100, {"n_nonzero": 0}, ["n_nonzero"]),
    ((24,), 100, {"patch_size": 1, "n_nonzero": 1, "normalise": True}, ["normalise", "normalise False"]),
    ((8, 8), 100, {"regions": (2, 2, 2)}, ["regions", "one int per axis"]),
    ((10,), 100, {"patch_size": 4}, ["patch_size", "none for vectors", "vectors=False"]),
    ((10,), 100, {"regions": 2}, ["regions", "Use regions 1"]),
    ((24,), 100, {"atoms": 8}, ["settings", "unknown ['atoms']"]),
    ((24,), 1, {}, ["n_records", "at least 2"]),
    ((2, 3, 4, 5), 10, {}, ["record shape"]),
    ((0,), 10, {}, ["record shape"]),
])
def test_impossible_configurations_are_refused_naming_the_value_and_the_fix(shape, n, given, names):
    vectors = shape == (10,)
    with pytest.raises(InputError) as refused:
        check_settings(shape, n, vectors=vectors, **given)
    for part in names:
        assert part in str(refused.value)


def test_the_bounds_named_in_the_refusals_are_exact():
    # "patch size ≤ 21": 21 works with 4 regions on 24 samples, 22 does not.
    assert check_settings((24,), 100, patch_size=21, regions=4).grid == (4,)
    with pytest.raises(InputError):
        check_settings((24,), 100, patch_size=22, regions=4)
    # "stride ≤ 3 with patch size 8" for 6 regions.
    assert check_settings((24,), 100, patch_size=8, stride=3, regions=6).grid == (6,)
    with pytest.raises(InputError):
        check_settings((24,), 100, patch_size=8, stride=4, regions=6)
    # "n_atoms ≤ 51" with 3 records of 17 patches each.
    assert check_settings((24,), 3, n_atoms=51, sample_patches=51).n_atoms == 51
    # What is refused here, the stages refuse too (later, after reading data).
    with pytest.raises(InputError):
        region_of_patches(PatchGeometry.for_records((24,), 22, 1).grid, 4)


def test_given_values_are_kept_and_their_reasons_say_so():
    s = check_settings((150,), 50, patch_size=37, regions=2)
    assert (s.patch_size, s.stride, s.regions) == ((37,), (1,), (2,))
    assert s.reasons["patch_size"] == "patch_size = (37,) was given."
    assert s.n_atoms == default_settings((150,), 50).n_atoms


def test_default_features_beat_the_raw_records_on_digits():
    # Outside reference: scikit-learn's digits (8×8 images, 1,797 rows, all of them), scored
    # by 5-fold stratified cross-validation with the evaluate stage's classifier; the
    # dictionary is learned inside each fold. Measured: raw 0.969, defaults 0.982.
    X, y = load_digits(return_X_y=True)
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    s = default_settings((8, 8), X.shape[0] * 4 // 5)
    features = make_pipeline(
        SparseCodePooler(n_atoms=s.n_atoms, record_shape=(8, 8), patch_size=s.patch_size,
                         stride=s.stride, regions=s.regions, n_nonzero=s.n_nonzero,
                         sample_patches=s.sample_patches, seed=0),
        make_classifier("logistic"))
    with threadpool_limits(1):
        raw = cross_val_score(make_classifier("logistic"), X, y, cv=folds).mean()
        coded = cross_val_score(features, X, y, cv=folds).mean()
    assert coded > raw
