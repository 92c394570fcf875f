"""Batch alternating minimisation: chunk statistics summed in any grouping give the same
update as one pass in memory, and the atom update meets the first-order optimality
condition of the unit-sphere-constrained least-squares problem.

Reference for the optimality check: Lagrange conditions for min ½tr(WᵀAW) − tr(WᵀB)
subject to ‖w_j‖ = 1 — at a block-coordinate fixed point, each atom's gradient
``(AW − B)_j`` is parallel to ``w_j`` (standard constrained-optimisation result; the
update is that of Mairal et al., JMLR 2010, Algorithm 2).
"""

from __future__ import annotations

import numpy as np

from atomline.stages.kernels.learning import (
    batch_statistics,
    batch_update,
    combine_statistics,
    learn,
)
from atomline.stages.kernels.learning._common import unit_rows

OMP3 = {"n_nonzero": 3}


def _data(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((1800, 12)) @ rng.standard_normal((12, 12))
    W0 = unit_rows(rng.standard_normal((20, 12)))
    return X, W0


def test_chunk_statistics_sum_to_the_in_memory_pass():
    X, W0 = _data()
    whole = batch_statistics(X, W0, "omp", OMP3)
    cuts = [0, 7, 700, 701, 1800]
    parts = [batch_statistics(X[a:b], W0, "omp", OMP3) for a, b in zip(cuts[:-1], cuts[1:])]
    merged = combine_statistics(parts[::-1])  # order of arrival must not matter
    np.testing.assert_allclose(merged["A"], whole["A"], rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(merged["B"], whole["B"], rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(merged["usage"], whole["usage"])
    np.testing.assert_allclose(merged["worst_energy"], whole["worst_energy"], rtol=1e-12)
    assert merged["n_rows"] == 1800
    np.testing.assert_allclose(batch_update(W0, merged), batch_update(W0, whole), atol=1e-9)
    # learn(..., "batch") runs exactly these functions: one pass from W0 gives that update.
    one = learn(X, 20, "batch", holdout=0, init=W0, n_passes=1, chunk_size=500,
                coder_options=OMP3)
    np.testing.assert_allclose(one.atoms, batch_update(W0, whole), atol=1e-9)


def test_atom_update_reaches_a_constrained_stationary_point():
    X, W0 = _data(1)
    stats = batch_statistics(X, W0, "omp", OMP3)
    W = batch_update(W0, stats, n_sweeps=300, dead_share=0.0, duplicate_cos=1.0)
    A, B = stats["A"], stats["B"]

    def surrogate(V: np.ndarray) -> float:
        return float(0.5 * np.trace(V.T @ A @ V) - np.trace(V.T @ B))

    assert surrogate(W) < surrogate(W0)
    np.testing.assert_allclose(np.linalg.norm(W, axis=1), 1.0, atol=1e-12)
    G = A @ W - B
    tangential = G - np.sum(G * W, axis=1, keepdims=True) * W
    assert np.abs(tangential).max() < 1e-6 * np.abs(G).max()


def test_batch_objective_falls_and_unused_atoms_are_replaced():
    X, _ = _data(2)
    # A dictionary with 5 copies of one atom: duplicates must be replaced by rows.
    rng = np.random.default_rng(0)
    W0 = unit_rows(rng.standard_normal((20, 12)))
    W0[15:] = W0[0]
    learned = learn(X, 20, "batch", holdout=0, init=W0, n_passes=8, coder_options=OMP3)
    trace = learned.diagnostics["objective"]
    assert trace[-1] < 0.8 * trace[0]
    assert learned.diagnostics["replaced"] >= 5
    assert learned.diagnostics["coherence"] < 0.98


def test_a_re_iterable_stream_gives_the_in_memory_result():
    X, W0 = _data(3)
    chunks = [X[i : i + 300] for i in range(0, 1800, 300)]
    opts = dict(holdout=0, init=W0, n_passes=3, coder_options=OMP3)
    streamed = learn(chunks, 20, "batch", **opts)
    in_memory = learn(X, 20, "batch", chunk_size=300, **opts)
    np.testing.assert_array_equal(streamed.atoms, in_memory.atoms)
