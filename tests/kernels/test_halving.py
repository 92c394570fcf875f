"""Successive-halving schedule and the survivors of a rung."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from atomline.stages.errors import InputError
from atomline.stages.kernels.halving import schedule, survivors


def as_tuples(rungs):
    return [(r.candidates, r.rows, r.keep) for r in rungs]


def test_worked_example_with_eta_three():
    # Outside reference: Jamieson & Talwalkar 2016, Algorithm 1 (successive halving), with
    # ⌈|S_k|/η⌉ survivors. Worked by hand: n = 27, η = 3 → ⌈log_3 27⌉ = 3 rungs of 27, 9, 3
    # configurations. The last rung uses all 900 rows on 3 configurations, so
    # B = 900·3·3 = 8100 and r_k = ⌊B / (|S_k|·3)⌋ = 100, 300, 900; every rung costs
    # B/3 = 2700 rows; 100 ≥ min_rows 50, so no rung is dropped.
    rungs = schedule(27, max_rows=900, min_rows=50, eta=3)
    assert as_tuples(rungs) == [(27, 100, 9), (9, 300, 3), (3, 900, 1)]
    assert [r.budget for r in rungs] == [2700, 2700, 2700]


def test_worked_example_with_halving_and_uneven_sizes():
    # Same reference, η = 2, n = 10: sizes 10, 5, ⌈5/2⌉ = 3, ⌈3/2⌉ = 2, i.e. ⌈log_2 10⌉ = 4
    # rungs. B = 1000·2·4 = 8000, r_k = ⌊8000 / (4·|S_k|)⌋ = 200, 400, 666, 1000; budgets
    # 2000, 2000, 1998, 2000 (the floor loses at most one trial's worth).
    rungs = schedule(10, max_rows=1000, min_rows=100, eta=2)
    assert as_tuples(rungs) == [(10, 200, 5), (5, 400, 3), (3, 666, 2), (2, 1000, 1)]
    assert [r.budget for r in rungs] == [2000, 2000, 1998, 2000]


def test_a_minimum_rows_per_trial_drops_rungs():
    # By hand: with 4 rungs the first would train on 200 < 300 rows, so 3 rungs: sizes
    # 10, 5, 3; B = 1000·3·3 = 9000, r_k = ⌊9000 / (3·|S_k|)⌋ = 300, 600, 1000, and the
    # last rung keeps one of its three.
    rungs = schedule(10, max_rows=1000, min_rows=300, eta=2)
    assert as_tuples(rungs) == [(10, 300, 5), (5, 600, 3), (3, 1000, 1)]
    # Rows so scarce that no cut fits: one rung, everything on all rows.
    assert as_tuples(schedule(10, max_rows=1000, min_rows=1000)) == [(10, 1000, 1)]
    assert as_tuples(schedule(1, max_rows=10, min_rows=1)) == [(1, 10, 1)]


@settings(max_examples=200, deadline=None)
@given(st.integers(1, 500), st.integers(1, 100_000), st.integers(1, 5_000), st.integers(2, 5))
def test_schedule_follows_the_definition(n, max_rows, min_rows, eta):
    if max_rows < min_rows:
        with pytest.raises(InputError):
            schedule(n, max_rows=max_rows, min_rows=min_rows, eta=eta)
        return
    rungs = schedule(n, max_rows=max_rows, min_rows=min_rows, eta=eta)
    m = len(rungs)
    # Jamieson & Talwalkar 2016: at most ⌈log_η n⌉ rungs, |S_{k+1}| = ⌈|S_k|/η⌉, and
    # r_k = ⌊B / (|S_k|·m)⌋ with B chosen so that the last rung trains on every row.
    assert m <= max(1, math.ceil(round(math.log(n, eta), 9))) if n > 1 else m == 1
    assert rungs[0].candidates == n and rungs[-1].rows == max_rows and rungs[-1].keep == 1
    for a, b in zip(rungs, rungs[1:]):
        assert b.candidates == a.keep == -(-a.candidates // eta)
    B = max_rows * rungs[-1].candidates * m
    for r in rungs:
        assert r.rows == B // (r.candidates * m)
        assert B / m - r.candidates < r.budget <= B / m
    assert rungs[0].rows >= min_rows or m == 1


@pytest.mark.parametrize("kwargs, name", [
    (dict(n_candidates=0, max_rows=10, min_rows=1), "n_candidates"),
    (dict(n_candidates=5, max_rows=10, min_rows=0), "min_rows"),
    (dict(n_candidates=5, max_rows=10, min_rows=1, eta=1), "eta"),
    (dict(n_candidates=5, max_rows=10, min_rows=20), "max_rows"),
])
def test_schedule_refuses_what_cannot_be_scheduled(kwargs, name):
    n = kwargs.pop("n_candidates")
    with pytest.raises(InputError, match=name):
        schedule(n, **kwargs)


def test_survivors_break_ties_by_cost_then_order():
    # 0.9 three times: costs 2, 1, 1 → the two cost-1 ones first (earlier first), then cost 2.
    assert survivors([0.9, 0.8, 0.9, 0.9], [2, 1, 1, 1], 3).tolist() == [2, 3, 0]
    assert survivors([0.5, 0.7], [1, 9], 1).tolist() == [1]  # score decides before cost


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 3)), min_size=1, max_size=30),
       st.data())
def test_survivors_equal_a_plain_sort(pairs, data):
    # Reference: Python's stable sort on (−score, cost, position), written independently.
    scores = np.array([p[0] / 4 for p in pairs])
    costs = np.array([float(p[1]) for p in pairs])
    k = data.draw(st.integers(1, len(pairs)))
    expected = sorted(range(len(pairs)), key=lambda i: (-scores[i], costs[i], i))[:k]
    assert survivors(scores, costs, k).tolist() == expected


@pytest.mark.parametrize("scores, costs, k, name", [
    ([0.1, np.nan], [1, 1], 1, "finite"),
    ([0.1, 0.2], [1], 1, "one length"),
    ([0.1, 0.2], [1, 1], 0, "k"),
    ([0.1, 0.2], [1, 1], 3, "k"),
])
def test_survivors_refuse_bad_input(scores, costs, k, name):
    with pytest.raises(InputError, match=name):
        survivors(scores, costs, k)
