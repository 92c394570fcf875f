"""Planted-dictionary recovery: the synthetic experiment of Aharon, Elad & Bruckstein.

Reference: M. Aharon, M. Elad, A. Bruckstein, "K-SVD: An algorithm for designing
overcomplete dictionaries for sparse representation", IEEE Trans. Signal Processing
54(11), 2006, section V-A. Setup as published: a random 20 × 50 dictionary (i.i.d.
uniform entries, unit-norm atoms), 1500 signals each a combination of 3 atoms at random
positions with i.i.d. uniform coefficients, white Gaussian noise at several SNRs, OMP
with 3 atoms as the coder, and an atom counts as recovered when ``1 − |cos| < 0.01``
with its best-matching learned atom.

The paper's rates are quoted **from memory** (the paper could not be checked offline
here): K-SVD recovered roughly 90–93% of the atoms at 20 dB, 30 dB and without noise,
clearly fewer at 10 dB, and MOD a few points less than K-SVD. We require at least 90%
at 20 dB and above for the online learner. SNR here is the ratio of the clean signals'
variance to the noise variance (our reading of the paper's definition).
"""

from __future__ import annotations

import numpy as np
import pytest

from atomline.stages.kernels.learning import learn

SNRS = (10, 20, 30, None)  # dB; None = noiseless


def planted(seed: int, snr_db: float | None, n: int = 1500, d: int = 20, k: int = 50,
            s: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """The published test data: dictionary (k, d) and signals (n, d)."""
    rng = np.random.default_rng(seed)
    D = rng.uniform(-1, 1, (k, d))
    D /= np.linalg.norm(D, axis=1, keepdims=True)
    Z = np.zeros((n, k))
    support = np.argsort(rng.random((n, k)), axis=1)[:, :s]
    Z[np.arange(n)[:, None], support] = rng.uniform(-1, 1, (n, s))
    X = Z @ D
    if snr_db is not None:
        X = X + rng.standard_normal(X.shape) * np.sqrt(X.var() / 10 ** (snr_db / 10))
    return D, X


def recovery_rate(D: np.ndarray, W: np.ndarray) -> float:
    """Share of planted atoms (rows of D) with a learned atom at 1 − |cos| < 0.01."""
    return float(np.mean(1 - np.abs(D @ W.T).max(axis=1) < 0.01))


def _run(method: str, seed: int, snr: float | None, **options) -> float:
    D, X = planted(seed, snr)
    learned = learn(X, 50, method, holdout=0, coder_options={"n_nonzero": 3}, seed=seed,
                    **options)
    return recovery_rate(D, learned.atoms)


def test_online_recovers_planted_atoms_at_each_snr(capsys):
    rates = {snr: _run("online", 0, snr, n_passes=20, batch_size=100) for snr in SNRS}
    with capsys.disabled():
        print("\nplanted 20x50, 1500 signals, 3 atoms — online recovery rate:",
              {("noiseless" if s is None else f"{s} dB"): r for s, r in rates.items()})
    for snr in (20, 30, None):
        assert rates[snr] >= 0.90, (snr, rates)
    # 10 dB is harder for every method in the paper; we only ask for a majority.
    assert rates[10] >= 0.6, rates


@pytest.mark.parametrize("method, options, floor", [
    # MOD-type batch iterations: the paper reports MOD a few points below K-SVD.
    ("batch", {"n_passes": 40}, 0.85),
    # Plain and averaged SGD have no published rate here; our floor is a regression guard
    # well above what random atoms reach (0%).
    ("sgd", {"n_passes": 30, "batch_size": 100}, 0.75),
    ("averaged-sgd", {"n_passes": 30, "batch_size": 100}, 0.75),
])
def test_other_learners_recover_most_planted_atoms_at_30db(method, options, floor):
    assert _run(method, 1, 30, **options) >= floor


def test_random_patches_baseline_recovers_almost_none():
    # Sanity of the criterion itself: rows mixing 3 atoms are not atoms.
    assert _run("random-patches", 0, 30) <= 0.1
