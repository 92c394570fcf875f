"""Online dictionary learning with accumulated statistics.

The method of Mairal, Bach, Ponce & Sapiro (JMLR 2010, "Online learning for matrix
factorization and sparse coding"): code each mini-batch with the current atoms, add its
sufficient statistics ``A = Σ z zᵀ`` (k, k) and ``B = Σ z xᵀ`` (k, d) to running sums,
then minimise the surrogate ``½ tr(Wᵀ A W) − tr(Wᵀ B)`` over the atoms one at a time
(block-coordinate descent, :func:`._common.bcd_sweep`) keeping each on the unit sphere.

Old statistics are down-weighted before each batch ``t`` is added by
``forget · (1 − 1/t)^warmup`` (``t`` counts batches since the start). The second factor
is the down-weighting of past statistics that Mairal et al. propose (cited from
memory): codes computed with the first, poor atoms fade out, while the weight of recent
batches tends to equal. ``forget < 1`` adds a constant forgetting for drifting archives
(memory of about ``1/(1 − forget)`` batches); by default it is chosen to keep about one
pass of statistics when an in-memory sample is read several times (stale codes from
earlier passes otherwise hold the atoms back: on the planted test recovery fell from
about 97% to about 80% without it).

Every ``replace_every`` batches, atoms used by fewer than ``dead_share`` times the mean
number of rows per atom in that window, and atoms nearly equal to another one
(|cos| > ``duplicate_cos``), are replaced by the worst-represented rows of the current
batch, and their statistics are cleared (the replacement of unused and near-duplicate
atoms that Aharon, Elad & Bruckstein describe for K-SVD, IEEE TSP 2006, applied to the
streaming statistics; the 0.15 share was tuned on the planted test).

Checkpoints and resume
----------------------
With ``checkpoint=f``, ``f(state)`` is called after every ``checkpoint_every``
source batches once the atoms exist. ``state`` holds numpy arrays (``atoms``, ``A``,
``B``, ``usage``, ``window``, ``objective``) and JSON scalars (``method``,
``batches_seen``, ``t``, ``n_replaced``, ``rng`` — the generator state as JSON text).
Pass it back as ``resume=state`` with the same options. For an in-memory source the
learner itself skips the first ``state["batches_seen"]`` batches of its seeded shuffle;
for an iterable source the **caller** must start the stream at batch number
``state["batches_seen"]`` (0-based) of the uninterrupted sequence. Either way the run
ends with exactly the atoms of an uninterrupted run.
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
    bcd_sweep,
    coded,
    check_forget,
    default_coder_options,
    default_forget,
    refresh_atoms,
    residual_energy,
    unit_rows,
)
from ._driver import DRIVER_KEYS, Step, run_minibatch

__all__ = ["online"]

_STATE_KEYS = ("atoms", "A", "B", *DRIVER_KEYS, "rng")


def online(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    coder: str = "omp",
    coder_options: dict | None = None,
    batch_size: int = 256,
    n_passes: int = 1,
    forget: float | None = None,
    warmup: float = 1.0,
    n_sweeps: int = 1,
    replace_every: int = 10,
    dead_share: float = 0.15,
    duplicate_cos: float = 0.98,
    seed: int = 0,
    init: np.ndarray | None = None,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 10,
    resume: dict | None = None,
) -> LearnedDictionary:
    """Learn ``n_atoms`` atoms from mini-batches.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
        Training rows, already preprocessed.
    n_atoms : int
        ``k``.
    coder : str
        Coding method for the inner loop (any name ``atomline.stages.kernels.coding.code``
        accepts).
    coder_options : dict, optional
        Its options; default ``{"n_nonzero": 5}`` for OMP.
    batch_size : int
        Rows per mini-batch (larger stream batches are cut to this size).
    n_passes : int
        Passes over an in-memory source.
    forget : float in [0, 1], optional
        Constant factor applied to the accumulated statistics before each batch.
        Default: :func:`._common.default_forget` (about one pass of memory for an
        in-memory source read in several passes, else 1). 0 keeps only the batch.
    warmup : float ≥ 0
        Exponent ``ρ`` of the schedule ``(1 − 1/t)^ρ``; 0 keeps all statistics.
    n_sweeps : int
        Block-coordinate sweeps over the atoms per batch.
    replace_every : int
        Batches between checks for unused or duplicate atoms; 0 never replaces.
    dead_share : float
        An atom used by fewer than this share of the mean usage in a window is unused.
    duplicate_cos : float
        Two atoms with |cos| above this are duplicates.
    seed : int
        Seeds the shuffling and the initial atoms.
    init : ndarray of shape (n_atoms, d), optional
        Starting atoms; by default ``n_atoms`` distinct rows of the first batch(es).
    checkpoint : callable, optional
        Called with the state dict every ``checkpoint_every`` source batches.
    checkpoint_every : int
    resume : dict, optional
        A state passed to ``checkpoint`` by an earlier run with the same options.

    Returns
    -------
    LearnedDictionary
        ``method="online"``; ``diagnostics["objective"]`` holds, per batch, the mean
        of ``½‖x − Wᵀz‖²`` over the batch coded with the atoms before the update.
    """
    forget = default_forget(source, batch_size, n_passes) if forget is None else forget
    forget = check_forget(forget, allow_zero=True)
    coder_options = default_coder_options(coder, coder_options)
    learner = _Online(n_atoms, init, coder, coder_options, forget, warmup, n_sweeps,
                      dead_share, duplicate_cos)
    run = run_minibatch(learner, source, n_atoms, method="online", state_keys=_STATE_KEYS,
                        batch_size=batch_size, n_passes=n_passes, replace_every=replace_every,
                        seed=seed, checkpoint=checkpoint, checkpoint_every=checkpoint_every,
                        resume=resume)
    W = learner.W
    return LearnedDictionary(
        atoms=W,
        method="online",
        params={
            "coder": coder, "coder_options": coder_options, "batch_size": int(batch_size),
            "n_passes": int(n_passes), "forget": float(forget), "warmup": float(warmup),
            "n_sweeps": int(n_sweeps), "replace_every": int(replace_every),
            "dead_share": float(dead_share), "duplicate_cos": float(duplicate_cos),
            "seed": int(seed),
        },
        diagnostics=run.diagnostics(W),
    )


class _Online(Step):
    """Statistics ``A`` (k, k) and ``B`` (k, d) with the warm-up schedule, then
    block-coordinate sweeps over the atoms ``W`` (k, d)."""

    def __init__(self, n_atoms, init, coder, coder_options, forget, warmup, n_sweeps,
                 dead_share, duplicate_cos) -> None:
        self.n_units = n_atoms
        self.W = None if init is None else unit_rows(as_rows(init, "init"))
        self.A = self.B = None
        self.coder, self.coder_options = coder, coder_options
        self.forget, self.warmup, self.n_sweeps = forget, warmup, n_sweeps
        self.dead_share, self.duplicate_cos = dead_share, duplicate_cos

    @property
    def width(self) -> int | None:
        return None if self.W is None else self.W.shape[1]

    def start(self, rows, rng):
        self.W = atoms_from_rows(rows, self.n_units, rng)

    def begin(self):
        self.A = np.zeros((self.n_units, self.n_units))
        self.B = np.zeros((self.n_units, self.W.shape[1]))

    def update(self, batch, t):
        Z = coded(batch, self.W, self.coder, self.coder_options)
        energy = residual_energy(batch, Z, self.W)
        decay = self.forget * (1.0 - 1.0 / t) ** self.warmup if t > 1 else self.forget
        self.A *= decay
        self.B *= decay
        self.A += (Z.T @ Z).toarray()
        self.B += Z.T @ batch
        self.W = bcd_sweep(self.W, self.A, self.B, self.n_sweeps)
        return energy, atom_usage(Z)

    def refresh(self, batch, energy, window):
        self.W, gone = refresh_atoms(self.W, window, batch, energy, self.dead_share,
                                     self.duplicate_cos)
        self.A[gone, :] = 0.0
        self.A[:, gone] = 0.0
        self.B[gone] = 0.0
        return int(gone.size)

    def state(self):
        return {"atoms": self.W.copy(), "A": self.A.copy(), "B": self.B.copy()}

    def restore(self, state):
        self.W = np.array(state["atoms"], dtype=np.float64)
        self.A = np.array(state["A"], dtype=np.float64)
        self.B = np.array(state["B"], dtype=np.float64)
