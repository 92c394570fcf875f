"""The learned (unrolled ISTA) encoder and the choice of lam from a target sparsity."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.stats import ortho_group

from atomline.stages.kernels.coding import LearnedEncoder, code, fit_learned_encoder, lambda_for_sparsity
from atomline.stages.kernels.coding.learned import _gradients, _relative_error
from atomline.stages.errors import InputError


def _problem(seed=0, k=40, d=16, n=300):
    rng = np.random.default_rng(seed)
    W = rng.standard_normal((k, d))
    W /= np.linalg.norm(W, axis=1, keepdims=True)
    Z = np.zeros((n, k))
    for i in range(n):
        Z[i, rng.choice(k, 3, replace=False)] = rng.standard_normal(3)
    return W, Z @ W + 0.05 * rng.standard_normal((n, d))


def _soft(v, t):
    return np.sign(v) * np.maximum(np.abs(v) - t, 0)


def test_untrained_encoder_is_ista_from_zero():
    # Published form (Gregor & LeCun 2010): LISTA initialised at ISTA's matrices is
    # ISTA (Daubechies, Defrise & De Mol 2004) run for n_layers steps from z = 0,
    # computed here directly from the formula.
    W, X = _problem()
    lam = 0.2
    enc = fit_learned_encoder(X, W, "fista", 3, lam=lam, n_steps=0)
    L = np.linalg.norm(W, 2) ** 2
    z = np.zeros((X.shape[0], W.shape[0]))
    for _ in range(3):
        z = _soft(z - (z @ W @ W.T - X @ W.T) / L, lam / L)
    np.testing.assert_allclose(code(X, W, "learned", encoder=enc).dense(), z, atol=1e-10)


def test_backpropagation_matches_finite_differences():
    W, X = _problem(1, k=8, d=5, n=20)
    target = code(X, W, "fista", lam=0.1, gap_tol=1e-10, max_iter=5000).dense()
    enc = fit_learned_encoder(X, W, "fista", 3, lam=0.1, n_steps=0)
    rng = np.random.default_rng(2)
    params = {"F": enc.filters + 0.01 * rng.standard_normal(enc.filters.shape),
              "S": enc.inhibition.copy(), "theta": enc.thresholds.copy()}
    grads = _gradients(X, target, params, 3, False)

    def loss(p):
        return 0.5 * _relative_error(X, target, p, 3, False, float(X.shape[0]))

    h = 1e-6
    for name, (i, j) in [("F", (1, 2)), ("S", (3, 4)), ("S", (0, 0)), ("theta", (5, None))]:
        key = (i,) if j is None else (i, j)
        up = {n: v.copy() for n, v in params.items()}
        down = {n: v.copy() for n, v in params.items()}
        up[name][key] += h
        down[name][key] -= h
        numeric = (loss(up) - loss(down)) / (2 * h)
        assert numeric == pytest.approx(grads[name][key], rel=1e-4, abs=1e-9)


def test_training_lowers_the_error_on_held_out_rows():
    W, X = _problem(3, n=800)
    lam = 0.15
    train, test = X[:600], X[600:]
    target = code(test, W, "fista", lam=lam, gap_tol=1e-10, max_iter=5000).dense()
    untrained = fit_learned_encoder(train, W, "fista", 3, lam=lam, n_steps=0)
    trained = fit_learned_encoder(train, W, "fista", 3, lam=lam, n_steps=300, seed=1,
                                  learning_rate=3e-3)

    def err(enc):
        Z = code(test, W, "learned", encoder=enc).dense()
        return np.sum((Z - target) ** 2) / np.sum(target ** 2)

    assert err(trained) < 0.7 * err(untrained)
    assert trained.info["relative_error_final"] < trained.info["relative_error_initial"]


def test_stored_form_round_trips_and_is_plain_json():
    W, X = _problem(4)
    enc = fit_learned_encoder(X, W, "omp", 2, n_nonzero=3, n_steps=20)
    attrs = json.loads(json.dumps(enc.attrs()))
    again = LearnedEncoder.from_stored(attrs, {k: v.copy() for k, v in enc.arrays().items()})
    a = code(X, W, "learned", encoder=enc)
    b = code(X, W, "learned", encoder=again)
    assert a.index.tobytes() == b.index.tobytes() and a.value.tobytes() == b.value.tobytes()
    assert attrs["info"]["target_method"] == "omp"
    with pytest.raises(InputError, match="format"):
        LearnedEncoder.from_stored({**attrs, "format": "other"}, enc.arrays())
    with pytest.raises(InputError, match="LearnedEncoder for atoms"):
        code(X, W[:-1], "learned", encoder=enc)


def test_lambda_for_sparsity_on_orthonormal_atoms_matches_closed_form():
    # Closed form: with orthonormal atoms the lasso code is soft(W x, lam), whose
    # nonzeros are the entries with |W x| > lam.
    d = 24
    Q = ortho_group.rvs(d, random_state=1)
    X = np.random.default_rng(2).standard_normal((400, d))
    lam = lambda_for_sparsity(X, Q, 6.0)
    mean = np.mean(np.sum(np.abs(X @ Q.T) > lam, axis=1))
    assert abs(mean - 6.0) < 0.05


@pytest.mark.parametrize("method", ["lars", "fista"])
def test_lambda_for_sparsity_hits_the_target(method):
    W, X = _problem(5, k=60, d=20, n=300)
    lam = lambda_for_sparsity(X, W, 4.0, method)
    assert abs(code(X, W, method, lam=lam).count.mean() - 4.0) < 0.1
    with pytest.raises(InputError, match="target_nonzero"):
        lambda_for_sparsity(X, W, 25.0)
