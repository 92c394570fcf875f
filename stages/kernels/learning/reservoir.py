"""A uniform training sample from a stream of batches, in one pass.

Every row of the stream gets an independent uniform key from a seeded generator; the
sample is the ``n_rows`` rows with the smallest keys (random-key reservoir sampling,
Efraimidis & Spirakis, Information Processing Letters 2006, with equal weights). Every
subset of ``n_rows`` rows is then equally likely, whatever the stream's length, which
need not be known in advance — so a sample drawn from a grown archive is fair to old and
new rows alike.

The keys are drawn one per row in stream order, so the sample depends on the seed and
on the sequence of rows only, not on how the rows are cut into batches. Rows whose key
cannot enter the current sample are dropped before any copy, so the cost per batch
shrinks as the stream grows.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ...errors import InputError, problem
from ._common import as_rows, generator_from_json, generator_to_json

__all__ = ["reservoir_sample", "Reservoir"]


class Reservoir:
    """The running state of a random-key reservoir (resumable).

    Parameters
    ----------
    n_rows : int
        Sample size.
    seed : int

    Attributes
    ----------
    rows : ndarray of shape (≤ n_rows, d) or None
    keys : ndarray of shape (≤ n_rows,)
    order : ndarray of shape (≤ n_rows,), int64
        Positions of the kept rows in the stream.
    seen : int
        Rows offered so far.
    """

    def __init__(self, n_rows: int, seed: int) -> None:
        if int(n_rows) < 1:
            raise InputError(problem("n_rows", "a positive sample size", repr(n_rows),
                                     "Ask for at least one row."))
        self.n_rows = int(n_rows)
        self.rng = np.random.default_rng(seed)
        self.rows: np.ndarray | None = None
        self.keys = np.zeros(0)
        self.order = np.zeros(0, np.int64)
        self.seen = 0

    def add(self, batch: np.ndarray) -> None:
        """Offer the rows of one batch, shape (m, d)."""
        batch = as_rows(batch, "stream batch", None if self.rows is None else self.rows.shape[1])
        m = batch.shape[0]
        new_keys = self.rng.random(m)
        cut = np.inf if self.keys.size < self.n_rows else self.keys.max()
        enter = np.flatnonzero(new_keys < cut)
        if self.rows is None:
            self.rows = batch[:0]
        self.rows = np.concatenate([self.rows, batch[enter]])
        self.keys = np.concatenate([self.keys, new_keys[enter]])
        self.order = np.concatenate([self.order, self.seen + enter])
        self.seen += m
        if self.keys.size > self.n_rows:
            keep = np.argpartition(self.keys, self.n_rows - 1)[: self.n_rows]
            self.rows, self.keys, self.order = self.rows[keep], self.keys[keep], self.order[keep]

    def sample(self) -> np.ndarray:
        """The kept rows in stream order, shape (min(n_rows, seen), d)."""
        if self.rows is None:
            raise InputError(problem("stream", "at least one batch of rows", "an empty stream",
                                     "Check the array being sampled is not empty."))
        return self.rows[np.argsort(self.order, kind="stable")]

    def state(self) -> dict:
        """Arrays and JSON scalars that :meth:`from_state` restores exactly."""
        return {"reservoir_rows": self.rows, "reservoir_keys": self.keys.copy(),
                "reservoir_order": self.order.copy(), "reservoir_seen": self.seen,
                "reservoir_rng": generator_to_json(self.rng)}

    @classmethod
    def from_state(cls, n_rows: int, state: dict) -> "Reservoir":
        """Inverse of :meth:`state`."""
        made = cls(n_rows, 0)
        made.rows = np.asarray(state["reservoir_rows"], dtype=np.float64)
        made.keys = np.asarray(state["reservoir_keys"], dtype=np.float64)
        made.order = np.asarray(state["reservoir_order"], dtype=np.int64)
        made.seen = int(state["reservoir_seen"])
        made.rng = generator_from_json(state["reservoir_rng"])
        return made


def reservoir_sample(batches: Iterable[np.ndarray], n_rows: int, seed: int) -> np.ndarray:
    """Draw ``n_rows`` rows uniformly without replacement from a stream of batches.

    Parameters
    ----------
    batches : iterable of ndarrays of shape (m_i, d), floating
        The stream, read once.
    n_rows : int
        Sample size; a shorter stream is returned whole.
    seed : int

    Returns
    -------
    ndarray of shape (min(n_rows, total rows), d), float64
        The sampled rows in stream order.
    """
    reservoir = Reservoir(n_rows, seed)
    for batch in batches:
        reservoir.add(batch)
    return reservoir.sample()
