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

Checkpoints hold ``atoms``, ``sums``, ``counts``, ``usage``, ``window``, ``objective``,
``batches_seen``, ``t``, ``n_replaced``; resume follows the ``online`` module's rules.
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
    check_forget,
    check_resume,
    coherence,
    default_forget,
    iter_batches,
    refresh_atoms,
    too_few_rows,
    unit_rows,
)

__all__ = ["kmeans", "assign"]

_STATE_KEYS = ("atoms", "sums", "counts", "usage", "window", "objective", "batches_seen",
               "t", "n_replaced")


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
    clock = CheckpointClock(checkpoint, checkpoint_every)
    resume = check_resume(resume, "kmeans", _STATE_KEYS)
    rng = np.random.default_rng(seed)
    if resume is None:
        W = None if init is None else unit_rows(as_rows(init, "init"))
        S = counts = usage = window = None
        objective: list[float] = []
        batches_seen = t = n_replaced = 0
    else:
        W = np.array(resume["atoms"], dtype=np.float64)
        S = np.array(resume["sums"], dtype=np.float64)
        counts = np.array(resume["counts"], dtype=np.float64)
        usage = np.array(resume["usage"], dtype=np.int64)
        window = np.array(resume["window"], dtype=np.int64)
        objective = [float(v) for v in resume["objective"]]
        batches_seen, t = int(resume["batches_seen"]), int(resume["t"])
        n_replaced = int(resume["n_replaced"])
    if isinstance(source, np.ndarray) and W is None:
        W = atoms_from_rows(as_rows(source), n_atoms, rng)

    def state() -> dict:
        return {"method": "kmeans", "atoms": W.copy(), "sums": S.copy(),
                "counts": counts.copy(), "usage": usage.copy(), "window": window.copy(),
                "objective": np.array(objective), "batches_seen": batches_seen, "t": t,
                "n_replaced": n_replaced}

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
            batch, pending = pool, []
        if S is None:
            S, counts = np.zeros_like(W), np.zeros(n_atoms)
            usage, window = np.zeros(n_atoms, np.int64), np.zeros(n_atoms, np.int64)
        labels, coef = assign(batch, W)
        energy = np.einsum("ij,ij->i", batch, batch) - coef * coef
        objective.append(float(0.5 * energy.mean()))
        t += 1
        one_hot = np.zeros((batch.shape[0], n_atoms))
        one_hot[np.arange(batch.shape[0]), labels] = coef
        used = np.bincount(labels, minlength=n_atoms)
        S = forget * S + one_hot.T @ batch
        counts = forget * counts + used
        usage += used
        window += used
        filled = np.linalg.norm(S, axis=1) > 0
        W[filled] = unit_rows(S[filled])
        if replace_every and t % replace_every == 0:
            W, gone = refresh_atoms(W, window, batch, energy, dead_share, duplicate_cos)
            S[gone], counts[gone] = 0.0, 0.0
            n_replaced += int(gone.size)
            window[:] = 0
        if closes:
            clock.tick(batches_seen, state)
    if W is None or S is None:
        too_few_rows(n_atoms)
    return LearnedDictionary(
        atoms=W,
        method="kmeans",
        params={"coder": "omp", "coder_options": {"n_nonzero": 1},
                "batch_size": int(batch_size), "n_passes": int(n_passes),
                "forget": float(forget), "replace_every": int(replace_every),
                "dead_share": float(dead_share), "duplicate_cos": float(duplicate_cos),
                "seed": int(seed)},
        diagnostics={"objective": objective, "usage": usage.tolist(),
                     "coherence": coherence(W), "replaced": n_replaced,
                     "batches_seen": batches_seen},
    )
