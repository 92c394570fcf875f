"""code() supplies the Gram matrix to every coder that takes one, once per dictionary."""

from __future__ import annotations

import numpy as np
import pytest

from atomline.stages.kernels.coding import METHODS, _common, code, gram

GRAM_CODERS = sorted(m for m, c in METHODS.items() if c.uses_gram)
OPTIONS = {"mp": {"n_nonzero": 3}, "omp": {"n_nonzero": 3}, "ormp": {"n_nonzero": 3},
           "cosamp": {"n_nonzero": 3}, "lars": {"lam": 0.1}, "ista": {"lam": 0.1},
           "fista": {"lam": 0.1}, "block-omp": {"group_size": 2, "n_groups": 2}}


def _problem(seed):
    rng = np.random.default_rng(seed)
    W = rng.standard_normal((24, 10))
    W /= np.linalg.norm(W, axis=1, keepdims=True)
    return rng.standard_normal((30, 10)), W


def test_every_coder_that_takes_a_gram_matrix_is_listed():
    # The record's flag follows the coder's signature (8 coders start from W Wᵀ).
    assert GRAM_CODERS == sorted(OPTIONS)


@pytest.mark.parametrize("method", GRAM_CODERS)
def test_gram_is_computed_once_per_dictionary_and_gives_the_same_codes(method, monkeypatch):
    X, W = _problem(1)
    calls = []
    real = _common.gram
    monkeypatch.setattr(_common, "gram", lambda atoms: calls.append(1) or real(atoms))
    _common._GRAMS.clear()
    first = code(X[:10], W, method, **OPTIONS[method])
    again = code(X[10:], W.copy(), method, **OPTIONS[method])  # equal atoms, another array
    assert len(calls) == 1
    given = code(X, W, method, gram=gram(W), **OPTIONS[method])
    for part, rows in ((first, slice(0, 10)), (again, slice(10, None))):
        np.testing.assert_array_equal(part.index, given.index[rows])
        np.testing.assert_array_equal(part.value, given.value[rows])


def test_changed_atoms_are_a_new_dictionary():
    X, W = _problem(2)
    _common._GRAMS.clear()
    code(X, W, "omp", n_nonzero=3)
    W2 = W.copy()
    W2[0] = -W2[0]
    kept = _common.cached_gram(W2)
    np.testing.assert_array_equal(kept, gram(W2))
    kept[:] = 0  # a caller's change does not reach the kept matrix
    np.testing.assert_array_equal(_common.cached_gram(W2), gram(W2))
    # float32 atoms are their own entry, in their own dtype.
    assert _common.cached_gram(W.astype(np.float32)).dtype == np.float32
