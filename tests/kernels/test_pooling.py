"""Pooling of sparse codes over regions of the patch grid."""

from __future__ import annotations

import numpy as np
import pytest

from atomline.stages.kernels.coding import SparseCodes
from atomline.stages.errors import InputError
from atomline.stages.kernels.pooling import pool_codes, region_of_patches


def _random_codes(n_records, P, k, q, seed):
    rng = np.random.default_rng(seed)
    dense = np.zeros((n_records * P, k))
    for row in range(n_records * P):  # test data only
        used = rng.integers(0, q + 1)
        dense[row, rng.choice(k, used, replace=False)] = rng.standard_normal(used)
    return SparseCodes.from_dense(dense, width=q), dense


def _reference(dense, n_records, P, k, region, R, reduce, split):
    # Straight from the definition: per record, per region, reduce each atom's column.
    z = dense.reshape(n_records, P, k)
    parts = [np.maximum(z, 0), np.maximum(-z, 0)] if split else [np.abs(z)]
    out = []
    for part in parts:
        per_region = []
        for r in range(R):
            block = part[:, region == r, :]
            per_region.append(block.max(axis=1) if reduce == "max" else block.mean(axis=1))
        out.append(np.concatenate(per_region, axis=1))
    return np.concatenate(out, axis=1)


@pytest.mark.parametrize("reduce", ["max", "mean"])
@pytest.mark.parametrize("split", [True, False])
@pytest.mark.parametrize("grid, regions", [((10,), 3), ((4, 6), (2, 3)), ((5, 5), 2)])
def test_pooling_matches_definition(reduce, split, grid, regions):
    P, k, q, n = int(np.prod(grid)), 7, 3, 4
    codes, dense = _random_codes(n, P, k, q, seed=P + k)
    region, R = region_of_patches(grid, regions)
    got = pool_codes(codes.index, codes.value, n_atoms=k, patch_region=region, n_regions=R,
                     reduce=reduce, split_sign=split)
    assert got.shape == (n, (2 if split else 1) * R * k) and got.dtype == np.float32
    np.testing.assert_allclose(got, _reference(dense, n, P, k, region, R, reduce, split),
                               rtol=1e-6, atol=1e-7)


def test_regions_are_equal_contiguous_parts():
    region, R = region_of_patches((10,), 4)
    assert R == 4
    np.testing.assert_array_equal(region, [0, 0, 0, 1, 1, 2, 2, 2, 3, 3])
    region, R = region_of_patches((2, 4), (2, 2))
    np.testing.assert_array_equal(region.reshape(2, 4), [[0, 0, 1, 1], [2, 2, 3, 3]])
    with pytest.raises(InputError, match="regions"):
        region_of_patches((3,), 4)
    with pytest.raises(InputError, match="reduce"):
        pool_codes(np.zeros((1, 1), int), np.zeros((1, 1)), n_atoms=1,
                   patch_region=np.zeros(1, int), n_regions=1, reduce="median")
