"""Reservoir sampling: one pass, uniform over the whole stream, deterministic.

Reference for the method: Efraimidis & Spirakis, "Weighted random sampling with a
reservoir", Information Processing Letters 97(5), 2006 (equal weights). The uniformity
check is a chi-square goodness-of-fit test (scipy.stats.chisquare) of how often each
stream position is included, against the uniform inclusion probability n/N.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from atomline.stages.errors import InputError
from atomline.stages.kernels.learning import reservoir_sample


def _stream(n_total: int, sizes: list[int]):
    """Rows whose single value is their position in the stream, cut into batches."""
    rows = np.arange(n_total, dtype=np.float64)[:, None]
    edges = np.cumsum([0] + sizes)
    return [rows[a:b] for a, b in zip(edges[:-1], edges[1:])]


def test_inclusion_is_uniform_over_the_stream():
    n_total, n_keep, trials = 200, 20, 4000
    sizes = [7, 50, 3, 90, 50]  # uneven batches: old and new rows must be treated alike
    counts = np.zeros(n_total)
    for trial in range(trials):
        picked = reservoir_sample(_stream(n_total, sizes), n_keep, seed=trial)
        counts[picked[:, 0].astype(int)] += 1
    expected = np.full(n_total, trials * n_keep / n_total)
    p = stats.chisquare(counts, expected).pvalue
    assert p > 0.001, p
    # First and last batches get the same share (the point of one uniform pass).
    assert abs(counts[:7].mean() - counts[-50:].mean()) < 0.1 * expected[0]


def test_sample_is_deterministic_and_independent_of_batch_cuts():
    a = reservoir_sample(_stream(1000, [100] * 10), 37, seed=5)
    b = reservoir_sample(_stream(1000, [1, 999]), 37, seed=5)
    c = reservoir_sample(_stream(1000, [100] * 10), 37, seed=6)
    assert a.shape == (37, 1)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    assert len(np.unique(a)) == 37  # without replacement
    assert np.all(np.diff(a[:, 0]) > 0)  # returned in stream order


def test_short_stream_is_returned_whole_and_bad_input_refused():
    out = reservoir_sample(_stream(10, [4, 6]), 50, seed=0)
    np.testing.assert_array_equal(out[:, 0], np.arange(10))
    with pytest.raises(InputError):
        reservoir_sample([], 5, seed=0)
    with pytest.raises(InputError):
        reservoir_sample([np.zeros((3, 2)), np.zeros((3, 4))], 5, seed=0)
