"""The resumable mini-batch driver shared by online, sgd, averaged-sgd, kmeans, subspaces.

The driver owns everything these learners do alike: restoring a checkpoint, the seeded
batch order (:func:`._common.iter_batches`, skipping the batches a resumed run has
seen), waiting for ``n_atoms`` rows of a stream before starting the atoms, the usage
counts and their window, the atom refresh every ``replace_every`` batches, the
objective trace and the checkpoint cadence. A learner is a :class:`Step`: how to start
its atoms, update them on one batch, refresh the unused ones, and what it adds to the
checkpoint.

One batch, in order: ``update`` (codes the batch with the current atoms, updates the
statistics and atoms, returns each row's residual energy and the rows per unit), the
counter ``t`` and the objective ``½ mean(energy)``, the usage counts, every
``replace_every``-th batch ``refresh`` (then the window restarts), ``settle``, and on the
last piece of a source batch the checkpoint clock.

Checkpoint state: the step's own arrays (:meth:`Step.state`) plus ``method``,
``usage``, ``window``, ``objective``, ``batches_seen``, ``t``, ``n_replaced`` and
``rng`` (the generator state as JSON text).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable

import numpy as np

from ._common import (
    Checkpoint,
    CheckpointClock,
    as_rows,
    check_resume,
    coherence,
    generator_from_json,
    generator_to_json,
    iter_batches,
    too_few_rows,
)

__all__ = ["Step", "Run", "run_minibatch", "DRIVER_KEYS"]

#: Checkpoint fields the driver writes for every learner (besides ``method`` and ``rng``).
DRIVER_KEYS = ("usage", "window", "objective", "batches_seen", "t", "n_replaced")


class Step:
    """What one mini-batch learner does; the driver calls these in the order above.

    ``n_units`` is the number of usage counters (atoms, or blocks for subspaces);
    ``width`` the row width ``d`` once the atoms exist, else ``None``.
    """

    n_units: int

    @property
    def width(self) -> int | None:
        raise NotImplementedError

    def start(self, rows: np.ndarray, rng: np.random.Generator) -> None:
        """Set the first atoms from ``rows`` (n, d), ``n ≥ n_atoms``, drawing with ``rng``."""
        raise NotImplementedError

    def begin(self) -> None:
        """Allocate the statistics once the atoms exist (not on resume)."""
        raise NotImplementedError

    def update(self, batch: np.ndarray, t: int) -> tuple[np.ndarray, np.ndarray]:
        """Learn from batch number ``t`` (1-based, since the start): residual energy per
        row (m,) with the atoms before the update, and rows per unit (n_units,)."""
        raise NotImplementedError

    def refresh(self, batch: np.ndarray, energy: np.ndarray, window: np.ndarray) -> int:
        """Replace unused or duplicate units; return how many were replaced."""
        raise NotImplementedError

    def settle(self, t: int) -> None:
        """Work after the refresh check, every batch (default: none)."""

    def state(self) -> dict:
        """The step's own checkpoint arrays (copies)."""
        raise NotImplementedError

    def restore(self, state: dict) -> None:
        """Take back what :meth:`state` gave (atoms and statistics)."""
        raise NotImplementedError


@dataclass
class Run:
    """What the driver counted: the objective per batch, usage per unit, atoms
    replaced, source batches seen."""

    objective: list[float]
    usage: np.ndarray
    n_replaced: int
    batches_seen: int

    def diagnostics(self, atoms: np.ndarray) -> dict:
        """The learners' diagnostics of final ``atoms`` (k, d) (see LearnedDictionary)."""
        return {"objective": self.objective, "usage": self.usage.tolist(),
                "coherence": coherence(atoms), "replaced": self.n_replaced,
                "batches_seen": self.batches_seen}


def run_minibatch(
    step: Step,
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    method: str,
    state_keys: tuple[str, ...],
    batch_size: int,
    n_passes: int,
    replace_every: int,
    seed: int,
    checkpoint: Checkpoint | None,
    checkpoint_every: int,
    resume: dict | None,
) -> Run:
    """Run ``step`` over the mini-batches of ``source``, resumably.

    Parameters
    ----------
    step : Step
        The learner's update, with its atoms set (``init``) or not yet.
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
        In memory: shuffled per pass with ``seed``; a stream: read once, in order.
    n_atoms : int
        Rows a stream must have given before the atoms are started.
    method : str
        Written to and checked in the checkpoint.
    state_keys : tuple of str
        Fields a checkpoint of this learner must hold to be resumed.
    batch_size, n_passes, replace_every, seed, checkpoint, checkpoint_every, resume
        As in ``online``.

    Returns
    -------
    Run
    """
    clock = CheckpointClock(checkpoint, checkpoint_every)
    resume = check_resume(resume, method, state_keys)
    if resume is None:
        rng = np.random.default_rng(seed)
        usage = window = None
        objective: list[float] = []
        batches_seen = t = n_replaced = 0
    else:
        # kmeans checkpoints carry no generator: it draws only its start, which a resumed
        # run has, so a fresh one changes nothing.
        rng = (generator_from_json(resume["rng"]) if "rng" in resume
               else np.random.default_rng(seed))
        step.restore(resume)
        usage = np.array(resume["usage"], dtype=np.int64)
        window = np.array(resume["window"], dtype=np.int64)
        objective = [float(v) for v in resume["objective"]]
        batches_seen, t = int(resume["batches_seen"]), int(resume["t"])
        n_replaced = int(resume["n_replaced"])
    if isinstance(source, np.ndarray) and step.width is None:
        # In memory: start from distinct rows drawn over the whole array.
        step.start(as_rows(source), rng)

    def state() -> dict:
        return {"method": method, **step.state(), "usage": usage.copy(),
                "window": window.copy(), "objective": np.array(objective),
                "batches_seen": batches_seen, "t": t, "n_replaced": n_replaced,
                "rng": generator_to_json(rng)}

    pending: list[np.ndarray] = []
    for batch, closes in iter_batches(source, batch_size, n_passes, seed, skip=batches_seen):
        batch = as_rows(batch, width=step.width)
        batches_seen += int(closes)
        if step.width is None:
            # Streamed, no init: wait for n_atoms rows, then start from them.
            pending.append(batch)
            pool = np.concatenate(pending)
            if pool.shape[0] < n_atoms:
                continue
            step.start(pool, rng)
            batch, pending = pool, []
        if usage is None:
            step.begin()
            usage = np.zeros(step.n_units, dtype=np.int64)
            window = np.zeros(step.n_units, dtype=np.int64)
        t += 1
        energy, used = step.update(batch, t)
        objective.append(float(0.5 * energy.mean()))
        usage += used
        window += used
        if replace_every and t % replace_every == 0:
            n_replaced += step.refresh(batch, energy, window)
            window[:] = 0
        step.settle(t)
        if closes:
            clock.tick(batches_seen, state)
    if usage is None:
        too_few_rows(n_atoms)
    return Run(objective, usage, n_replaced, batches_seen)
