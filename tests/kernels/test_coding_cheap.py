"""Cheap encoders (threshold, triangle, hard) and block OMP against closed forms and
outside references."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from scipy.stats import ortho_group
from sklearn.linear_model import orthogonal_mp_gram
from sklearn.metrics import pairwise_distances_argmin

from atomline.stages.kernels.coding import code, code_width


def _data(seed=0, k=48, d=12, n=40):
    rng = np.random.default_rng(seed)
    W = rng.standard_normal((k, d))
    W /= np.linalg.norm(W, axis=1, keepdims=True)
    return W, rng.standard_normal((n, d))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_threshold_is_soft_thresholding_of_correlations(dtype):
    # Closed form: sign(c)·max(|c| − alpha, 0) with c = W x.
    W, X = _data()
    X = X.astype(dtype)
    C = X @ W.T.astype(dtype)
    c = code(X, W, "threshold", alpha=0.7)
    assert c.value.dtype == dtype and c.n_atoms == 48
    expected = np.sign(C) * np.maximum(np.abs(C) - dtype(0.7), 0)
    np.testing.assert_allclose(c.dense(), expected, rtol=1e-6, atol=1e-6)
    assert np.all(c.count == (expected != 0).sum(axis=1))


def test_threshold_split_sign_gives_positive_and_negative_parts():
    # Closed form: [max(0, c − alpha) | max(0, −c − alpha)], 2k outputs, width k.
    W, X = _data(1)
    C = X @ W.T
    c = code(X, W, "threshold", alpha=0.2, split_sign=True)
    assert c.n_atoms == 96 and c.width == 48 == code_width("threshold", 48, split_sign=True)
    expected = np.hstack([np.maximum(C - 0.2, 0), np.maximum(-C - 0.2, 0)])
    np.testing.assert_allclose(c.dense(), expected, atol=1e-12)
    full = code(X, W, "threshold", alpha=0.0, split_sign=True)
    np.testing.assert_allclose(full.dense()[:, :48] - full.dense()[:, 48:], C, atol=1e-12)


def test_triangle_matches_distances_from_scipy():
    # Reference: scipy.spatial.distance.cdist for ‖x − w_j‖; the activation is
    # max(0, mean_j dist − dist_j) (Coates, Lee & Ng 2011).
    W, X = _data(2)
    W = W * 1.7
    D = cdist(X, W)
    expected = np.maximum(D.mean(axis=1, keepdims=True) - D, 0)
    c = code(X, W, "triangle")
    np.testing.assert_allclose(c.dense(), expected, atol=1e-10)
    assert c.count.min() >= 1 and c.count.max() < 48


def test_hard_assignment_matches_scikit_learn_nearest_centroid():
    # Reference: sklearn.metrics.pairwise_distances_argmin.
    W, X = _data(3)
    W = W * np.linspace(0.5, 2, 48)[:, None]
    c = code(X, W, "hard")
    np.testing.assert_array_equal(c.index[:, 0], pairwise_distances_argmin(X, W))
    np.testing.assert_array_equal(c.value, 1.0)
    assert code_width("hard", 48) == 1


def test_block_omp_with_one_group_on_orthonormal_blocks_is_k_subspaces_assignment():
    # Closed form: each row is projected on the orthonormal block that keeps the most
    # energy, ‖Q_g x‖ largest (k-subspaces assignment).
    d, size, groups = 12, 3, 6
    rng = np.random.default_rng(4)
    W = np.vstack([ortho_group.rvs(d, random_state=s)[:size] for s in range(groups)])
    X = rng.standard_normal((60, d))
    C = X @ W.T
    energy = (C ** 2).reshape(60, groups, size).sum(axis=2)
    best = np.argmax(energy, axis=1)
    expected = np.zeros_like(C)
    for g in range(groups):
        rows = best == g
        expected[rows, g * size:(g + 1) * size] = C[rows, g * size:(g + 1) * size]
    got = code(X, W, "block-omp", group_size=size, n_groups=1).dense()
    np.testing.assert_allclose(got, expected, atol=1e-10)


def test_block_omp_with_unit_groups_equals_scikit_learn_omp():
    # Reference: sklearn.linear_model.orthogonal_mp_gram — groups of one atom are OMP.
    W, X = _data(5, k=40, d=20)
    ref = orthogonal_mp_gram(W @ W.T, (X @ W.T).T, n_nonzero_coefs=4).T
    got = code(X, W, "block-omp", group_size=1, n_groups=4).dense()
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-10)


def test_block_omp_fits_two_groups_exactly():
    # A row made of two groups' atoms is reproduced exactly by least squares on them
    # (incoherent random atoms in 64 dimensions: a rule of thumb of the trade).
    d, size = 64, 4
    rng = np.random.default_rng(6)
    W = rng.standard_normal((32, d))
    W /= np.linalg.norm(W, axis=1, keepdims=True)
    Z = np.zeros((10, 32))
    for i in range(10):
        g = rng.choice(8, 2, replace=False)
        for gg in g:
            Z[i, gg * size:(gg + 1) * size] = rng.uniform(1, 2, size)
    got = code(Z @ W, W, "block-omp", group_size=size, n_groups=2)
    assert got.width == 8 == code_width("block-omp", 32, group_size=4, n_groups=2)
    np.testing.assert_allclose(got.dense(), Z, atol=1e-9)
