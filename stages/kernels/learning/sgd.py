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
    CheckpointClock,
    LearnedDictionary,
    as_rows,
    atoms_from_rows,
    atom_usage,
    check_resume,
    coded,
    coherence,
    default_coder_options,
    generator_from_json,
    generator_to_json,
    iter_batches,
    refresh_atoms,
    too_few_rows,
    unit_rows,
)

__all__ = ["sgd", "averaged_sgd"]

_STATE_KEYS = ("atoms", "average", "usage", "window", "objective", "batches_seen", "t",
               "n_replaced", "rng")
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
    clock = CheckpointClock(checkpoint, checkpoint_every)
    resume = check_resume(resume, method, _STATE_KEYS)
    if resume is None:
        rng = np.random.default_rng(seed)
        W = None if init is None else unit_rows(as_rows(init, "init"))
        avg = None if W is None else W.copy()
        usage = window = None
        objective: list[float] = []
        batches_seen = t = n_replaced = 0
    else:
        rng = generator_from_json(resume["rng"])
        W = np.array(resume["atoms"], dtype=np.float64)
        avg = np.array(resume["average"], dtype=np.float64)
        usage = np.array(resume["usage"], dtype=np.int64)
        window = np.array(resume["window"], dtype=np.int64)
        objective = [float(v) for v in resume["objective"]]
        batches_seen, t = int(resume["batches_seen"]), int(resume["t"])
        n_replaced = int(resume["n_replaced"])
    if isinstance(source, np.ndarray) and W is None:
        W = atoms_from_rows(as_rows(source), n_atoms, rng)
        avg = W.copy()

    def state() -> dict:
        return {"method": method, "atoms": W.copy(), "average": avg.copy(),
                "usage": usage.copy(), "window": window.copy(),
                "objective": np.array(objective), "batches_seen": batches_seen, "t": t,
                "n_replaced": n_replaced, "rng": generator_to_json(rng)}

    pending: list[np.ndarray] = []
    for batch, closes in iter_batches(source, batch_size, n_passes, seed, skip=batches_seen):
        batch = as_rows(batch, width=None if W is None else W.shape[1])
        batches_seen += int(closes)
        if W is None:
            pending.append(batch)
            pool = np.concatenate(pending)
            if pool.shape[0] < n_atoms:
                continue
            W = atoms_from_rows(pool, n_atoms, rng)
            avg, batch, pending = W.copy(), pool, []
        if usage is None:
            usage = np.zeros(n_atoms, dtype=np.int64)
            window = np.zeros(n_atoms, dtype=np.int64)
        Z = coded(batch, W, coder, coder_options)
        R = batch - Z @ W
        energy = np.einsum("ij,ij->i", R, R)
        objective.append(float(0.5 * energy.mean()))
        t += 1
        lipschitz = float(np.linalg.norm((Z.T @ Z).toarray(), 2))
        if lipschitz > 0:
            eta = step / np.sqrt(1.0 + t / step_decay_batches)
            W = unit_rows(W + (eta / lipschitz) * (Z.T @ R))
        used = atom_usage(Z)
        usage += used
        window += used
        if replace_every and t % replace_every == 0:
            W, gone = refresh_atoms(W, window, batch, energy, dead_share, duplicate_cos)
            avg[gone] = W[gone]  # a replaced atom starts a new average
            n_replaced += int(gone.size)
            window[:] = 0
        omega = (1.0 + average_decay) / (t + average_decay)
        avg = (1.0 - omega) * avg + omega * W
        if closes:
            clock.tick(batches_seen, state)
    if W is None or usage is None:
        too_few_rows(n_atoms)
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
        diagnostics={"objective": objective, "usage": usage.tolist(),
                     "coherence": coherence(atoms), "replaced": n_replaced,
                     "batches_seen": batches_seen},
    )

