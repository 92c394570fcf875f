"""The in-memory records→features chain's pieces: seeded chunk-wise sampling and the
baseline dictionaries."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.decomposition import PCA

from atomline.stages.errors import InputError
from atomline.stages.kernels.features import baseline_atoms, sample_patches, take_rows
from atomline.stages.kernels.prep import PatchGeometry


def _reader(records, chunk_rows, log):
    def read(c):
        log.append(c)
        return records[c * chunk_rows : (c + 1) * chunk_rows]
    return read


def test_sample_does_not_depend_on_the_chunking_and_reads_only_chunks_it_needs():
    rng = np.random.default_rng(0)
    records = rng.standard_normal((500, 12))
    geometry = PatchGeometry.for_records((12,), 4, 2)  # 5 patches per record
    samples = []
    for chunk_rows in (7, 64, 500):
        log = []
        samples.append(sample_patches(500, geometry, 60, seed=3, chunk_rows=chunk_rows,
                                      read=_reader(records, chunk_rows, log)))
        assert len(log) == len(set(log))  # each chunk read at most once
        if chunk_rows == 7:
            # 2 × ⌈60 / 5⌉ = 24 records are drawn, so most of the 72 chunks are never read.
            assert len(log) <= 24
    assert samples[0].shape == (60, 4) and samples[0].dtype == np.float64
    np.testing.assert_array_equal(samples[0], samples[1])
    np.testing.assert_array_equal(samples[0], samples[2])
    other = sample_patches(500, geometry, 60, seed=4, chunk_rows=64, read=_reader(records, 64, []))
    assert not np.array_equal(samples[0], other)


def test_sample_draws_from_the_candidate_rows_only():
    # Record i holds the value i everywhere, so a patch names the record it came from.
    records = np.repeat(np.arange(300, dtype=np.float64)[:, None], 8, axis=1)
    geometry = PatchGeometry.for_records((8,), 4, 4)  # 2 patches per record
    candidates = np.arange(100, 300, 3)
    got = sample_patches(candidates, geometry, 1000, seed=0, chunk_rows=32,
                         read=_reader(records, 32, []))
    # Fewer patches than asked: all 2 × 67 patches of the candidates, in row order.
    assert got.shape == (2 * candidates.size, 4)
    np.testing.assert_array_equal(np.unique(got[:, 0]), candidates)
    assert np.all(np.diff(got[:, 0]) >= 0)


def test_take_rows_reads_given_rows_in_order():
    records = np.arange(100)[:, None] * np.ones((1, 3))
    rows = np.array([0, 9, 10, 11, 55, 99])
    log = []
    np.testing.assert_array_equal(take_rows(rows, 10, _reader(records, 10, log)), records[rows])
    assert log == [0, 1, 5, 9]


def test_baseline_atoms():
    rng = np.random.default_rng(4)
    patches = rng.standard_normal((500, 12)) * np.linspace(3, 0.2, 12)
    # Reference: scikit-learn's PCA components (up to sign).
    pca = baseline_atoms("pca", patches, 20)
    ref = PCA(n_components=12).fit(patches).components_
    assert pca.shape == (12, 12)
    np.testing.assert_allclose(np.abs(np.sum(pca * ref, axis=1)), 1.0, atol=1e-8)
    rand = baseline_atoms("random_patches", patches, 20, seed=1)
    assert rand.shape == (20, 12)
    np.testing.assert_allclose(np.linalg.norm(rand, axis=1), 1.0)
    # Every random atom is one of the patches, scaled.
    unit = patches / np.linalg.norm(patches, axis=1, keepdims=True)
    assert np.all(np.max(unit @ rand.T, axis=0) > 1 - 1e-12)
    with pytest.raises(InputError, match="baseline"):
        baseline_atoms("wavelets", patches, 4)


def test_random_patch_baseline_skips_flat_patches():
    # Contrast-normalised flat patches are zero rows: they cannot be atoms.
    rng = np.random.default_rng(5)
    patches = np.zeros((400, 6))
    patches[::4] = rng.standard_normal((100, 6))
    atoms = baseline_atoms("random_patches", patches, 30, seed=0)
    np.testing.assert_allclose(np.linalg.norm(atoms, axis=1), 1.0)
    with pytest.raises(InputError, match="non-constant"):
        baseline_atoms("random_patches", np.zeros((50, 6)), 3)
