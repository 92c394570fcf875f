"""Projected stochastic gradient on the atoms, plain and averaged.

Each mini-batch ``X`` (m, d) is coded with the current atoms, ``Z`` (m, k); the
gradient of the batch loss ``½‖X − Z W‖²`` is ``−Zᵀ(X − Z W)``, and the step is

    W ← unit_rows(W + η_t Zᵀ(X − Z W) / L),    η_t = step / sqrt(1 + t / τ)

with ``τ`` = ``step_decay_batches`` (the step halves after ``3τ`` batches) and
``L = ‖Zᵀ Z‖₂`` (the batch gradient's Lipschitz constant, so ``η_t ≤ 1`` never
overshoots on the batch). Projecting on the unit sphere after the step is the usual
constraint handling (the formulations of Aharon, Elad & Bruckstein and of Mairal et
al. keep atoms unit-norm).

``averaged-sgd`` returns the running average of the iterates with polynomially
decaying weights (``W̄_t = (1 − ω_t) W̄_{t−1} + ω_t W_t`` with
``ω_t = (1 + c) / (t + c)``, the averaging of Shamir & Zhang, ICML 2013, c =
``average_decay``), normalised. The average smooths the noise of the steps; the
weights favour recent iterates so the first, poor atoms do not weigh on the result.

Unused and duplicate atoms are replaced as in ``online``. Checkpoints and resume follow
the ``online`` module's rules (``state["batches_seen"]``).
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ._common import (
    Checkpoint,
    LearnedDictionary,
    as_rows,
    atoms_from_rows,
    atom_usage,
    coded,
    default_coder_options,
    refresh_atoms,
    unit_rows,
)
from ._driver import DRIVER_KEYS, Step, run_minibatch

__all__ = ["sgd", "averaged_sgd"]

_STATE_KEYS = ("atoms", "average", *DRIVER_KEYS, "rng")
#: ``c`` of the iterate averaging; plain sgd keeps the (unused) average too, with this ``c``.
_AVERAGE_DECAY = 3.0


def sgd(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    coder: str = "omp",
    coder_options: dict | None = None,
    batch_size: int = 256,
    n_passes: int = 1,
    step: float = 1.0,
    step_decay_batches: float = 10.0,
    replace_every: int = 10,
    dead_share: float = 0.15,
    duplicate_cos: float = 0.98,
    seed: int = 0,
    init: np.ndarray | None = None,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 10,
    resume: dict | None = None,
) -> LearnedDictionary:
    """Plain projected SGD; options as :func:`averaged_sgd` without ``average_decay``.

    Returns
    -------
    LearnedDictionary
        ``method="sgd"``, atoms of shape (n_atoms, d).
    """
    # locals() here is exactly the parameters: the signature is the options' one declaration.
    return _run(method="sgd", average_decay=_AVERAGE_DECAY, **locals())


def averaged_sgd(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    coder: str = "omp",
    coder_options: dict | None = None,
    batch_size: int = 256,
    n_passes: int = 1,
    step: float = 1.0,
    step_decay_batches: float = 10.0,
    average_decay: float = _AVERAGE_DECAY,
    replace_every: int = 10,
    dead_share: float = 0.15,
    duplicate_cos: float = 0.98,
    seed: int = 0,
    init: np.ndarray | None = None,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 10,
    resume: dict | None = None,
) -> LearnedDictionary:
    """Projected SGD returning the weighted average of its iterates.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
        Training rows, already preprocessed.
    n_atoms : int
        ``k``.
    coder, coder_options
        The coder of the mini-batches (default OMP, ``n_nonzero`` 5).
    batch_size, n_passes
        Rows per mini-batch; passes over an in-memory source.
    step, step_decay_batches
        ``step`` in units of 1/L, and ``τ`` in batches (see the module docstring).
    average_decay
        ``c`` of the iterate averaging.
    replace_every, dead_share, duplicate_cos, seed, init, checkpoint, checkpoint_every, resume
        As in ``online``.

    Returns
    -------
    LearnedDictionary
        ``method="averaged-sgd"``, atoms of shape (n_atoms, d).
    """
    return _run(method="averaged-sgd", **locals())  # the parameters, as in sgd


def _run(
    *,
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    method: str,
    coder: str,
    coder_options: dict | None,
    batch_size: int,
    n_passes: int,
    step: float,
    step_decay_batches: float,
    average_decay: float,
    replace_every: int,
    dead_share: float,
    duplicate_cos: float,
    seed: int,
    init: np.ndarray | None,
    checkpoint: Checkpoint | None,
    checkpoint_every: int,
    resume: dict | None,
) -> LearnedDictionary:
    averaged = method == "averaged-sgd"
    coder_options = default_coder_options(coder, coder_options)
    learner = _Projected(n_atoms, init, coder, coder_options, step, step_decay_batches,
                         average_decay, dead_share, duplicate_cos)
    run = run_minibatch(learner, source, n_atoms, method=method, state_keys=_STATE_KEYS,
                        batch_size=batch_size, n_passes=n_passes, replace_every=replace_every,
                        seed=seed, checkpoint=checkpoint, checkpoint_every=checkpoint_every,
                        resume=resume)
    W, avg = learner.W, learner.avg
    atoms = unit_rows(avg) if averaged else W
    params = {
        "coder": coder, "coder_options": coder_options, "batch_size": int(batch_size),
        "n_passes": int(n_passes), "step": float(step),
        "step_decay_batches": float(step_decay_batches),
        "replace_every": int(replace_every), "dead_share": float(dead_share),
        "duplicate_cos": float(duplicate_cos), "seed": int(seed),
    }
    if averaged:
        params["average_decay"] = float(average_decay)
    return LearnedDictionary(
        atoms=atoms,
        method=method,
        params=params,
        diagnostics=run.diagnostics(atoms),
    )


class _Projected(Step):
    """A gradient step on the atoms ``W`` (k, d), projected on the unit sphere, and the
    weighted average ``avg`` of the iterates (kept by plain sgd too: one code path)."""

    def __init__(self, n_atoms, init, coder, coder_options, step, step_decay_batches,
                 average_decay, dead_share, duplicate_cos) -> None:
        self.n_units = n_atoms
        self.W = None if init is None else unit_rows(as_rows(init, "init"))
        self.avg = None if self.W is None else self.W.copy()
        self.coder, self.coder_options = coder, coder_options
        self.step, self.step_decay_batches = step, step_decay_batches
        self.average_decay = average_decay
        self.dead_share, self.duplicate_cos = dead_share, duplicate_cos

    @property
    def width(self) -> int | None:
        return None if self.W is None else self.W.shape[1]

    def start(self, rows, rng):
        self.W = atoms_from_rows(rows, self.n_units, rng)
        self.avg = self.W.copy()

    def begin(self):
        pass  # no statistics: the step needs only the current batch

    def update(self, batch, t):
        Z = coded(batch, self.W, self.coder, self.coder_options)
        R = batch - Z @ self.W
        energy = np.einsum("ij,ij->i", R, R)
        lipschitz = float(np.linalg.norm((Z.T @ Z).toarray(), 2))
        if lipschitz > 0:
            eta = self.step / np.sqrt(1.0 + t / self.step_decay_batches)
            self.W = unit_rows(self.W + (eta / lipschitz) * (Z.T @ R))
        return energy, atom_usage(Z)

    def refresh(self, batch, energy, window):
        self.W, gone = refresh_atoms(self.W, window, batch, energy, self.dead_share,
                                     self.duplicate_cos)
        self.avg[gone] = self.W[gone]  # a replaced atom starts a new average
        return int(gone.size)

    def settle(self, t):
        omega = (1.0 + self.average_decay) / (t + self.average_decay)
        self.avg = (1.0 - omega) * self.avg + omega * self.W

    def state(self):
        return {"atoms": self.W.copy(), "average": self.avg.copy()}

    def restore(self, state):
        self.W = np.array(state["atoms"], dtype=np.float64)
        self.avg = np.array(state["average"], dtype=np.float64)

