"""The special-case dictionaries against outside references.

* PCA: the span of the atoms equals the span of the leading right singular vectors of
  the centred rows from numpy.linalg.svd.
* Spherical k-means: scikit-learn's KMeans (Lloyd) objective from the same start, on the
  digits data set that scikit-learn ships. Fair comparison: rows are scaled to unit norm,
  where Euclidean k-means and spherical k-means optimise nearly the same thing
  (‖x − c‖² = 2 − 2⟨x, c⟩ for unit c), and both partitions are scored with the *same*
  criterion, the Euclidean within-cluster sum of squares about each cluster's mean
  (scikit-learn's ``inertia_``). The digits are non-negative, so the sign-free
  assignment of our gain-shape quantiser equals the signed one.
* k-subspaces: a planted union of random subspaces, compared by principal angles from
  scipy.linalg.subspace_angles.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import subspace_angles
from sklearn.cluster import KMeans
from sklearn.datasets import load_digits

from atomline.stages.errors import InputError
from atomline.stages.kernels.learning import learn
from atomline.stages.kernels.learning.kmeans import assign


def test_pca_spans_the_svd_subspace_in_memory_and_streamed():
    rng = np.random.default_rng(0)
    X = rng.standard_normal((3000, 12)) @ rng.standard_normal((12, 12)) + 5.0
    k = 4
    _, _, Vt = np.linalg.svd(X - X.mean(axis=0), full_matrices=False)
    reference = Vt[:k].T @ Vt[:k]
    for source in (X, [X[i : i + 500] for i in range(0, 3000, 500)]):
        learned = learn(source, k, "pca", holdout=0)
        W = learned.atoms
        np.testing.assert_allclose(W @ W.T, np.eye(k), atol=1e-10)
        np.testing.assert_allclose(W.T @ W, reference, atol=1e-8)
    with pytest.raises(InputError):
        learn(X, 13, "pca")


def _digits_unit() -> np.ndarray:
    X = load_digits().data.astype(np.float64)
    return X / np.linalg.norm(X, axis=1, keepdims=True)


def _inertia(X: np.ndarray, labels: np.ndarray) -> float:
    return float(sum(((X[labels == j] - X[labels == j].mean(axis=0)) ** 2).sum()
                     for j in np.unique(labels)))


@pytest.mark.parametrize("start_seed", [0, 1, 2])
def test_spherical_kmeans_matches_sklearn_objective_from_same_start(start_seed):
    X = _digits_unit()
    k = 10
    start = X[np.random.default_rng(start_seed).choice(len(X), k, replace=False)]
    reference = KMeans(k, init=start, n_init=1, max_iter=300, tol=0,
                       algorithm="lloyd").fit(X).inertia_
    # Full-batch passes: the Lloyd-type iteration of the same start.
    full = learn(X, k, "kmeans", holdout=0, init=start, batch_size=len(X), n_passes=100,
                 replace_every=0)
    assert abs(_inertia(X, assign(X, full.atoms)[0]) / reference - 1) < 0.01
    # Mini-batches (the streaming form): no worse than 1% above the reference.
    mini = learn(X, k, "kmeans", holdout=0, init=start, batch_size=256, n_passes=30)
    assert _inertia(X, assign(X, mini.atoms)[0]) <= 1.01 * reference


def test_subspaces_recover_a_planted_union_of_subspaces():
    rng = np.random.default_rng(3)
    d, s, L, per = 20, 3, 6, 400
    bases = [np.linalg.qr(rng.standard_normal((d, s)))[0] for _ in range(L)]
    X = np.concatenate([rng.standard_normal((per, s)) @ B.T for B in bases])
    X += 0.01 * rng.standard_normal(X.shape)
    learned = learn(X, L * s, "subspaces", block_size=s, holdout=0, n_passes=20,
                    batch_size=300, seed=0)
    W = learned.atoms
    assert learned.params["block_size"] == s
    blocks = [W[l * s : (l + 1) * s].T for l in range(L)]
    for l in range(L):
        np.testing.assert_allclose(blocks[l].T @ blocks[l], np.eye(s), atol=1e-10)
    for B in bases:
        # Largest principal angle to the best-matching learned block, in radians.
        best = min(np.max(subspace_angles(B, blk)) for blk in blocks)
        assert best < 0.05, best
    # Coded with its block coder, every row is explained up to the planted noise
    # (noise left outside the block ≈ 17 · 0.01² per row against a signal energy of 3).
    assert learned.params["coder"] == "block-omp"
    assert learned.diagnostics["train_error"] < 2e-3


def test_random_patches_are_normalised_training_rows():
    rng = np.random.default_rng(1)
    X = rng.standard_normal((500, 8))
    learned = learn(X, 16, "random-patches", holdout=0, seed=4)
    unit = X / np.linalg.norm(X, axis=1, keepdims=True)
    matches = np.abs(learned.atoms @ unit.T).max(axis=1)
    np.testing.assert_allclose(matches, 1.0, atol=1e-12)
    again = learn(X, 16, "random-patches", holdout=0, seed=4)
    np.testing.assert_array_equal(again.atoms, learned.atoms)
