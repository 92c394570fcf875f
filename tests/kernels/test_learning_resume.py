"""Checkpoint and resume: an interrupted run, resumed from its last checkpoint, ends
with exactly the atoms of an uninterrupted run (bit for bit).

The crash is simulated by a batch stream that raises mid-way; the caller then restarts
the stream at ``state["batches_seen"]`` as the learners document. The reference is the
uninterrupted run of the same code (no outside reference exists for this property).
"""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest

from atomline.stages.errors import InputError
from atomline.stages.kernels.learning import learn
from atomline.stages.kernels.prep import Normaliser


class Crash(Exception):
    pass


def _batches(n_batches: int = 14, m: int = 120, d: int = 10, seed: int = 0) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    mix = rng.standard_normal((d, d))
    return [rng.standard_normal((m, d)) @ mix for _ in range(n_batches)]


def _crashing(batches: list[np.ndarray], at: int):
    for i, b in enumerate(batches):
        if i == at:
            raise Crash(f"stream died at batch {i}")
        yield b


def _assert_plain(state: dict) -> None:
    for key, value in state.items():
        if not isinstance(value, np.ndarray):
            json.dumps(value)  # JSON scalars only, e.g. for Zarr attributes
        else:
            assert value.dtype.kind in "fiub", key


CASES = [
    ("online", {"coder_options": {"n_nonzero": 3}, "replace_every": 2, "batch_size": 50}),
    ("sgd", {"coder_options": {"n_nonzero": 3}, "replace_every": 2}),
    ("averaged-sgd", {"coder_options": {"n_nonzero": 3}}),
    ("kmeans", {"replace_every": 2}),
    ("subspaces", {"block_size": 2, "replace_every": 2}),
    ("pca", {}),
    ("random-patches", {}),
]


@pytest.mark.parametrize("method, options", CASES, ids=[c[0] for c in CASES])
def test_streamed_resume_equals_uninterrupted(method, options):
    batches = _batches()
    n_atoms = 8 if method == "pca" else 16
    prep = Normaliser(whiten=True, whiten_eps=0.1) if method == "online" else None
    common = dict(seed=3, checkpoint_every=3, preprocessing=prep, **options)
    whole = learn(iter(batches), n_atoms, method, **common)

    saved: list[dict] = []
    with pytest.raises(Crash):
        learn(_crashing(batches, at=10), n_atoms, method,
              checkpoint=lambda s: saved.append(copy.deepcopy(s)), **common)
    state = saved[-1]
    assert state["batches_seen"] == 9
    _assert_plain(state)
    resumed = learn(iter(batches[state["batches_seen"]:]), n_atoms, method, resume=state,
                    **common)
    np.testing.assert_array_equal(resumed.atoms, whole.atoms)
    assert resumed.diagnostics["objective"] == whole.diagnostics["objective"]
    assert resumed.diagnostics["holdout_error"] == whole.diagnostics["holdout_error"]
    if prep is not None:
        np.testing.assert_array_equal(resumed.preprocessing.whitening,
                                      whole.preprocessing.whitening)


def test_in_memory_resume_skips_batches_itself():
    X = np.concatenate(_batches())
    opts = dict(coder_options={"n_nonzero": 3}, n_passes=3, batch_size=100, seed=1,
                checkpoint_every=5)
    whole = learn(X, 16, "online", **opts)
    saved: list[dict] = []

    def dying(state: dict) -> None:
        saved.append(copy.deepcopy(state))
        if len(saved) == 4:
            raise Crash("killed after the 4th checkpoint")

    with pytest.raises(Crash):
        learn(X, 16, "online", checkpoint=dying, **opts)
    resumed = learn(X, 16, "online", resume=saved[-1], **opts)
    np.testing.assert_array_equal(resumed.atoms, whole.atoms)


class _Passes:
    """A re-iterable source (read once per pass) that dies on a given pass."""

    def __init__(self, batches: list[np.ndarray], die_on_pass: int | None) -> None:
        self.batches, self.die_on_pass, self.passes = batches, die_on_pass, 0

    def __iter__(self):
        self.passes += 1
        if self.passes == self.die_on_pass:
            raise Crash("reader died")
        return iter(self.batches)


def test_batch_learner_resumes_at_the_pass_it_lost():
    batches = _batches()
    opts = dict(coder_options={"n_nonzero": 3}, n_passes=6, seed=2, holdout=0)
    whole = learn(_Passes(batches, None), 16, "batch", **opts)
    saved: list[dict] = []
    with pytest.raises(Crash):
        learn(_Passes(batches, 5), 16, "batch", checkpoint=saved.append, **opts)
    # Pass 1 of the reader draws the initial atoms; passes 2-4 are iterations 1-3.
    assert saved[-1]["passes_done"] == 3
    resumed = learn(_Passes(batches, None), 16, "batch", resume=saved[-1], **opts)
    np.testing.assert_array_equal(resumed.atoms, whole.atoms)


def test_kmeans_resumes_from_a_checkpoint_without_a_generator_state():
    # kmeans checkpoints written before the shared mini-batch driver carry no "rng";
    # k-means draws only its start, so such a state still resumes to the same atoms.
    batches = _batches()
    common = dict(seed=3, checkpoint_every=3, replace_every=2)
    whole = learn(iter(batches), 16, "kmeans", **common)
    saved: list[dict] = []
    with pytest.raises(Crash):
        learn(_crashing(batches, at=10), 16, "kmeans",
              checkpoint=lambda s: saved.append(copy.deepcopy(s)), **common)
    state = {k: v for k, v in saved[-1].items() if k != "rng"}
    resumed = learn(iter(batches[state["batches_seen"]:]), 16, "kmeans", resume=state, **common)
    np.testing.assert_array_equal(resumed.atoms, whole.atoms)


@pytest.mark.parametrize("method", ["online", "sgd", "subspaces"])
def test_a_state_missing_a_driver_field_is_refused(method):
    saved: list[dict] = []
    learn(iter(_batches()), 16, method, seed=1, checkpoint=saved.append, checkpoint_every=4)
    state = {k: v for k, v in saved[-1].items() if k != "window"}
    with pytest.raises(InputError, match="missing \\['window'\\]"):
        learn(iter(_batches()), 16, method, seed=1, resume=state)
