"""Spherical k-means, mini-batch: each row is coded by its one best-matching atom.

Each row ``x`` is assigned to the atom ``j`` of largest ``|⟨x, w_j⟩|`` and coded as
``s = ⟨x, w_j⟩``; the loss is ``½ Σ ‖x − s w_j‖² = ½ Σ (‖x‖² − s²)``, i.e. 1-sparse
coding (the "gain-shape" vector quantiser used for features by Coates & Ng, ICML 2011;
with non-negative similarities it is the spherical k-means of Dhillon & Modha,
Machine Learning 2001). Each atom is the normalised sum ``Σ s x`` of the rows assigned
to it — a power-iteration step towards the cluster's leading direction, which never
increases the loss.

The sums are kept across mini-batches with forgetting (as in ``online``): with the
default in memory, one pass of statistics; with ``batch_size ≥ n_rows`` and several
passes it is the batch (Lloyd-type) iteration. Clusters left empty in a window, and
duplicate atoms, are re-seeded with the worst-represented rows.

Checkpoints hold ``atoms``, ``sums``, ``counts`` and the shared driver's fields
(:mod:`._driver`); resume follows the ``online`` module's rules.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ._common import (
    Checkpoint,
    LearnedDictionary,
    as_rows,
    atoms_from_rows,
    check_forget,
    default_forget,
    refresh_atoms,
    unit_rows,
)
from ._driver import DRIVER_KEYS, Step, run_minibatch

__all__ = ["kmeans", "assign"]

#: No "rng": checkpoints written before the shared driver lack it (see ._driver).
_STATE_KEYS = ("atoms", "sums", "counts", *DRIVER_KEYS)


def assign(X: np.ndarray, W: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Best-matching atom of each row and its coefficient.

    Parameters
    ----------
    X : ndarray of shape (m, d)
    W : ndarray of shape (k, d), unit rows

    Returns
    -------
    labels : ndarray of shape (m,), int
    coef : ndarray of shape (m,)
        ``⟨x, w_label⟩``.
    """
    C = X @ W.T
    labels = np.abs(C).argmax(axis=1)
    return labels, C[np.arange(X.shape[0]), labels]


def kmeans(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    batch_size: int = 1024,
    n_passes: int = 1,
    forget: float | None = None,
    replace_every: int = 10,
    dead_share: float = 0.15,
    duplicate_cos: float = 0.98,
    seed: int = 0,
    init: np.ndarray | None = None,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 10,
    resume: dict | None = None,
) -> LearnedDictionary:
    """Learn ``n_atoms`` unit-norm cluster directions.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
    n_atoms : int
    batch_size : int
        Rows per mini-batch (larger stream batches are cut to this size).
    n_passes : int
        Passes over an in-memory source.
    forget : float in [0, 1], optional
        Factor on the sums before each batch; default as in ``online``.
    replace_every, dead_share, duplicate_cos
        As in ``online``.
    seed : int
    init : ndarray of shape (n_atoms, d), optional
        Starting atoms (normalised); by default distinct rows.
    checkpoint, checkpoint_every, resume
        As in ``online``.

    Returns
    -------
    LearnedDictionary
        ``method="kmeans"``; ``objective`` per batch is the mean of ``½(‖x‖² − s²)``
        before the update; the atoms are meant for OMP with one nonzero.
    """
    forget = check_forget(default_forget(source, batch_size, n_passes) if forget is None
                          else forget, allow_zero=True)
    learner = _Clusters(n_atoms, init, forget, dead_share, duplicate_cos)
    run = run_minibatch(learner, source, n_atoms, method="kmeans", state_keys=_STATE_KEYS,
                        batch_size=batch_size, n_passes=n_passes, replace_every=replace_every,
                        seed=seed, checkpoint=checkpoint, checkpoint_every=checkpoint_every,
                        resume=resume)
    W = learner.W
    return LearnedDictionary(
        atoms=W,
        method="kmeans",
        params={"coder": "omp", "coder_options": {"n_nonzero": 1},
                "batch_size": int(batch_size), "n_passes": int(n_passes),
                "forget": float(forget), "replace_every": int(replace_every),
                "dead_share": float(dead_share), "duplicate_cos": float(duplicate_cos),
                "seed": int(seed)},
        diagnostics=run.diagnostics(W),
    )


class _Clusters(Step):
    """Forgetful sums ``S`` (k, d) of ``s x`` over each atom's rows, and row counts;
    each atom ``W[j]`` is its normalised sum."""

    def __init__(self, n_atoms, init, forget, dead_share, duplicate_cos) -> None:
        self.n_units = n_atoms
        self.W = None if init is None else unit_rows(as_rows(init, "init"))
        self.S = self.counts = None
        self.forget, self.dead_share, self.duplicate_cos = forget, dead_share, duplicate_cos

    @property
    def width(self) -> int | None:
        return None if self.W is None else self.W.shape[1]

    def start(self, rows, rng):
        self.W = atoms_from_rows(rows, self.n_units, rng)

    def begin(self):
        self.S, self.counts = np.zeros_like(self.W), np.zeros(self.n_units)

    def update(self, batch, t):
        labels, coef = assign(batch, self.W)
        energy = np.einsum("ij,ij->i", batch, batch) - coef * coef
        one_hot = np.zeros((batch.shape[0], self.n_units))
        one_hot[np.arange(batch.shape[0]), labels] = coef
        used = np.bincount(labels, minlength=self.n_units)
        self.S = self.forget * self.S + one_hot.T @ batch
        self.counts = self.forget * self.counts + used
        filled = np.linalg.norm(self.S, axis=1) > 0
        self.W[filled] = unit_rows(self.S[filled])
        return energy, used

    def refresh(self, batch, energy, window):
        self.W, gone = refresh_atoms(self.W, window, batch, energy, self.dead_share,
                                     self.duplicate_cos)
        self.S[gone], self.counts[gone] = 0.0, 0.0
        return int(gone.size)

    def state(self):
        return {"atoms": self.W.copy(), "sums": self.S.copy(), "counts": self.counts.copy()}

    def restore(self, state):
        self.W = np.array(state["atoms"], dtype=np.float64)
        self.S = np.array(state["sums"], dtype=np.float64)
        self.counts = np.array(state["counts"], dtype=np.float64)
