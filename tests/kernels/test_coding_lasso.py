"""Lasso coders (LARS homotopy, ISTA, FISTA) against scikit-learn and closed forms.

Objective here: ½‖x − Wᵀz‖² + lam·‖z‖₁ per row. scikit-learn's Lasso minimises
(1 / (2·n_samples))‖y − A w‖² + alpha·‖w‖₁ with n_samples = d rows of A = Wᵀ, so the
same problem is alpha = lam / d.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.stats import ortho_group
from sklearn.linear_model import Lasso, LassoLars

from atomline.stages.kernels.coding import code, code_width

LASSO = ["lars", "fista", "ista"]
TIGHT = {"lars": {}, "fista": {"gap_tol": 1e-13, "max_iter": 50000},
         "ista": {"gap_tol": 1e-12, "max_iter": 200000}}


def _problem(seed, k=50, d=25, n=12):
    rng = np.random.default_rng(seed)
    W = rng.standard_normal((k, d))
    W /= np.linalg.norm(W, axis=1, keepdims=True)
    return W, rng.standard_normal((n, d))


def _objective(X, W, Z, lam):
    return 0.5 * np.sum((X - Z @ W) ** 2, axis=1) + lam * np.abs(Z).sum(axis=1)


def _sklearn_lasso(X, W, lam, positive=False):
    # Reference: scikit-learn coordinate descent, alpha = lam / d (its 1/(2 n) scaling).
    d = W.shape[1]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.array([Lasso(alpha=lam / d, fit_intercept=False, tol=1e-14, max_iter=200000,
                               positive=positive).fit(W.T, x).coef_ for x in X])


@pytest.mark.parametrize("method", ["lars", "fista"])
@pytest.mark.parametrize("positive", [False, True])
def test_objective_matches_scikit_learn_lasso(method, positive):
    # Reference: sklearn.linear_model.Lasso (coordinate descent) on the same problem.
    W, X = _problem(1)
    lam = 0.3
    ref = _sklearn_lasso(X, W, lam, positive)
    Z = code(X, W, method, lam=lam, positive=positive, **TIGHT[method]).dense()
    np.testing.assert_allclose(_objective(X, W, Z, lam), _objective(X, W, ref, lam), rtol=1e-6)
    if positive:
        assert Z.min() >= 0


def test_lars_supports_and_coefficients_match_scikit_learn_lasso_lars():
    # Reference: sklearn.linear_model.LassoLars (the same homotopy, its own code).
    # Random Gaussian atoms are in general position, so the solution is unique.
    W, X = _problem(2, k=40, d=30, n=10)
    lam = 0.2
    d = W.shape[1]
    ref = np.array([LassoLars(alpha=lam / d, fit_intercept=False).fit(W.T, x).coef_ for x in X])
    Z = code(X, W, "lars", lam=lam).dense()
    np.testing.assert_array_equal(Z != 0, ref != 0)
    np.testing.assert_allclose(Z, ref, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("method", LASSO)
def test_kkt_conditions_hold(method):
    # Lasso optimality (KKT): with rho = W(x − Wᵀz), rho_j = lam·sign(z_j) where
    # z_j ≠ 0 and |rho_j| ≤ lam elsewhere.
    W, X = _problem(3)
    lam = 0.25
    Z = code(X, W, method, lam=lam, **TIGHT[method]).dense()
    rho = (X - Z @ W) @ W.T
    on = Z != 0
    assert on.any()
    np.testing.assert_allclose(rho[on], lam * np.sign(Z[on]), atol=1e-6)
    assert np.all(np.abs(rho[~on]) <= lam * (1 + 1e-6))


@pytest.mark.parametrize("method", LASSO)
def test_lambda_above_max_correlation_gives_exact_zeros(method):
    # Closed form: z = 0 is optimal iff lam ≥ ‖W x‖∞.
    W, X = _problem(4)
    lam = np.abs(X @ W.T).max()
    c = code(X, W, method, lam=lam)
    assert np.all(c.count == 0) and np.all(c.dense() == 0)
    c = code(X, W, method, lam=0.999 * lam)
    assert c.count.sum() >= 1


@pytest.mark.parametrize("method", LASSO)
@pytest.mark.parametrize("positive", [False, True])
def test_orthonormal_dictionary_gives_soft_thresholding(method, positive):
    # Closed form: with orthonormal atoms the lasso solution is soft(W x, lam)
    # (non-negative lasso: max(W x − lam, 0)).
    d = 16
    Q = ortho_group.rvs(d, random_state=3)
    X = np.random.default_rng(5).standard_normal((20, d))
    lam = 0.4
    C = X @ Q.T
    if positive:
        expected = np.maximum(C - lam, 0)
    else:
        expected = np.sign(C) * np.maximum(np.abs(C) - lam, 0)
    Z = code(X, Q, method, lam=lam, positive=positive, **TIGHT[method]).dense()
    np.testing.assert_allclose(Z, expected, atol=1e-9)


def test_fista_on_beck_example_10_38_lands_near_the_true_vector():
    # Worked example quoted from memory: Beck, First-Order Methods in Optimization
    # (SIAM 2017), Example 10.38 — A is 100×110 standard normal, b = A x_true with
    # x_true = e₃ − e₇, lam = 1; FISTA's iterates approach x_true (slightly shrunk).
    rng = np.random.default_rng(0)
    A = rng.standard_normal((100, 110))
    x_true = np.zeros(110)
    x_true[2], x_true[6] = 1.0, -1.0
    b = A @ x_true
    z = code(b[None, :], A.T, "fista", lam=1.0, gap_tol=1e-10, max_iter=5000).dense()[0]
    assert set(np.flatnonzero(z)) == {2, 6}
    np.testing.assert_allclose(z, x_true, atol=0.05)


def test_fista_warm_start_is_used():
    W, X = _problem(6)
    lam = 0.3
    exact = code(X, W, "lars", lam=lam)
    best = _objective(X, W, exact.dense(), lam)
    cold = code(X, W, "fista", lam=lam, max_iter=1).dense()
    warm = code(X, W, "fista", lam=lam, max_iter=1, init=exact).dense()
    np.testing.assert_allclose(_objective(X, W, warm, lam), best, rtol=1e-9)
    assert np.all(_objective(X, W, cold, lam) > best * (1 + 1e-3))


@pytest.mark.parametrize("method", LASSO)
def test_max_nonzero_bounds_width(method):
    W, X = _problem(7)
    lam = 0.05
    full = code(X, W, method, lam=lam)
    assert full.width == code_width(method, 50) == 50
    assert full.count.max() > 4
    c = code(X, W, method, lam=lam, max_nonzero=4)
    assert c.width == code_width(method, 50, max_nonzero=4) == 4
    assert c.count.max() == 4
