"""Greedy coders (OMP, ORMP, MP, CoSaMP) against outside references and closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import ortho_group
from sklearn.linear_model import orthogonal_mp_gram

from atomline.stages.kernels.coding import SparseCodes, code, code_width
from atomline.stages.errors import InputError


def _unit_atoms(rng, k, d):
    W = rng.standard_normal((k, d))
    return W / np.linalg.norm(W, axis=1, keepdims=True)


@pytest.mark.parametrize("k,d,n_nonzero", [(64, 24, 5), (40, 60, 10), (128, 32, 1)])
def test_omp_matches_scikit_learn_orthogonal_mp_gram(k, d, n_nonzero):
    # Reference: scikit-learn's orthogonal_mp_gram (Batch-OMP of Rubinstein et al.)
    # on the same Gram matrix and correlations.
    rng = np.random.default_rng(k + d)
    W = _unit_atoms(rng, k, d)
    X = rng.standard_normal((300, d))
    G = W @ W.T
    ref = orthogonal_mp_gram(G, (X @ W.T).T, n_nonzero_coefs=n_nonzero).T
    got = code(X, W, "omp", n_nonzero=n_nonzero).dense()
    np.testing.assert_array_equal(got != 0, ref != 0)
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-9 * np.abs(ref).max())


def test_omp_tolerance_matches_scikit_learn_with_absolute_target():
    # Reference: scikit-learn's orthogonal_mp_gram with tol (squared residual norm);
    # our tol is relative to ‖x‖², so give every row the same norm.
    rng = np.random.default_rng(3)
    W = _unit_atoms(rng, 80, 30)
    X = rng.standard_normal((200, 30))
    X /= np.linalg.norm(X, axis=1, keepdims=True)
    G = W @ W.T
    ref = orthogonal_mp_gram(G, (X @ W.T).T, tol=0.2, norms_squared=np.ones(200)).T
    got = code(X, W, "omp", n_nonzero=30, tol=0.2).dense()
    np.testing.assert_array_equal(got != 0, ref != 0)
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-12)


@pytest.mark.parametrize("method", ["omp", "ormp", "mp", "cosamp"])
def test_orthonormal_dictionary_gives_hard_thresholding(method):
    # Closed form: with orthonormal atoms, W x holds the exact coefficients and the
    # best s-term approximation keeps the s largest |W x| (hard thresholding).
    rng = np.random.default_rng(5)
    d, s = 20, 4
    Q = ortho_group.rvs(d, random_state=7)
    X = rng.standard_normal((50, d))
    C = X @ Q.T
    keep = np.argsort(-np.abs(C), axis=1)[:, :s]
    expected = np.zeros_like(C)
    np.put_along_axis(expected, keep, np.take_along_axis(C, keep, axis=1), axis=1)
    got = code(X, Q, method, n_nonzero=s).dense()
    np.testing.assert_allclose(got, expected, atol=1e-10)


def test_ormp_residual_no_larger_than_omp_on_average():
    # Published property (Cotter et al. 1999; ORMP chooses the atom that most lowers
    # the residual after the orthogonal update, OMP the most correlated one).
    rng = np.random.default_rng(11)
    gaps = []
    for trial in range(5):
        W = _unit_atoms(rng, 96, 32)
        X = rng.standard_normal((200, 32))
        res = {}
        for method in ("omp", "ormp"):
            Z = code(X, W, method, n_nonzero=6).dense()
            res[method] = np.sum((X - Z @ W) ** 2, axis=1)
        gaps.append(np.mean(res["ormp"]) - np.mean(res["omp"]))
    assert np.mean(gaps) < 0


def test_omp_exact_recovery_of_sparse_combination():
    # Rule of thumb of the trade: incoherent random dictionary, 3 atoms in 64 dims.
    rng = np.random.default_rng(2)
    W = _unit_atoms(rng, 128, 64)
    Z = np.zeros((40, 128))
    for i in range(40):
        Z[i, rng.choice(128, 3, replace=False)] = rng.choice([-1, 1], 3) * rng.uniform(1, 2, 3)
    got = code(Z @ W, W, "omp", n_nonzero=3).dense()
    np.testing.assert_allclose(got, Z, atol=1e-9)


def test_width_and_zero_rows():
    rng = np.random.default_rng(0)
    W = _unit_atoms(rng, 30, 10)
    X = rng.standard_normal((5, 10))
    X[2] = 0
    for method in ("omp", "ormp"):
        c = code(X, W, method, n_nonzero=4)
        assert c.width == code_width(method, 30, n_nonzero=4) == 4
        assert c.count[2] == 0 and np.all(c.index[2] == -1) and np.all(c.value[2] == 0)
        assert np.all(c.count[[0, 1, 3, 4]] == 4)
    assert code_width("omp", 3, n_nonzero=8) == 3


def test_bad_options_are_refused():
    W = np.eye(4)
    with pytest.raises(InputError, match="n_nonzero"):
        code(np.ones((2, 4)), W, "omp", n_nonzero=0)
    with pytest.raises(InputError, match="options of coder"):
        code(np.ones((2, 4)), W, "omp", n_nonzero=2, lam=1.0)
    with pytest.raises(InputError, match="coding method"):
        code(np.ones((2, 4)), W, "nope")


def test_limit_keeps_largest_slots_and_counts_cut_rows():
    index = np.array([[4, 1, 7, -1], [2, 0, -1, -1], [-1, -1, -1, -1]], dtype=np.int32)
    value = np.array([[0.5, -3.0, 2.0, 0], [1.0, -1.0, 0, 0], [0, 0, 0, 0]])
    codes = SparseCodes(index, value, np.array([3, 2, 0], dtype=np.int32), 8)
    cut, n_cut = codes.limit(2)
    assert n_cut == 1
    np.testing.assert_array_equal(cut.index, [[1, 7], [2, 0], [-1, -1]])
    np.testing.assert_array_equal(cut.value, [[-3.0, 2.0], [1.0, -1.0], [0, 0]])
    np.testing.assert_array_equal(cut.count, [2, 2, 0])
    wide, n_cut = codes.limit(6)
    assert n_cut == 0 and wide.width == 6
    np.testing.assert_array_equal(wide.dense(), codes.dense())
