"""Online dictionary learning with accumulated statistics.

The method of Mairal, Bach, Ponce & Sapiro (JMLR 2010, "Online learning for matrix
factorization and sparse coding"): code each mini-batch with the current atoms, add its
sufficient statistics ``A = Σ z zᵀ`` (k, k) and ``B = Σ z xᵀ`` (k, d) to running sums,
then minimise the surrogate ``½ tr(Wᵀ A W) − tr(Wᵀ B)`` over the atoms one at a time
(block-coordinate descent) and put each atom back on the unit sphere.

With ``forget < 1`` the old statistics are scaled by ``forget`` before each batch is
added, so a drifting archive weighs recent batches more.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ..coding import code
from ..errors import InputError, problem
from ._common import LearnedDictionary, coherence, iter_batches, unit_rows

__all__ = ["online"]


def online(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    coder: str = "omp",
    coder_options: dict | None = None,
    batch_size: int = 256,
    n_passes: int = 1,
    forget: float = 1.0,
    seed: int = 0,
    init: np.ndarray | None = None,
) -> LearnedDictionary:
    """Learn ``n_atoms`` atoms from mini-batches.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
        Training rows, already preprocessed.
    n_atoms : int
        ``k``.
    coder : str
        Coding method for the inner loop (a name of ``atomline.stages.coding.METHODS``).
    coder_options : dict, optional
        Its options; default ``{"n_nonzero": 5}`` for OMP.
    batch_size : int
        Rows per mini-batch (in-memory source only).
    n_passes : int
        Passes over an in-memory source.
    forget : float in (0, 1]
        Factor applied to the accumulated statistics before each batch.
    seed : int
        Seeds the shuffling and the initial atoms.
    init : ndarray of shape (n_atoms, d), optional
        Starting atoms; by default ``n_atoms`` rows of the first batch(es).

    Returns
    -------
    LearnedDictionary
        ``method="online"``; diagnostics hold the per-batch objective
        ``½‖x − Wᵀz‖² + penalty-free`` mean over the batch (before the update).
    """
    coder_options = {"n_nonzero": 5} if coder_options is None else dict(coder_options)
    rng = np.random.default_rng(seed)
    batches = iter_batches(source, batch_size, n_passes, seed)
    W = None if init is None else unit_rows(np.array(init, dtype=np.float64))
    A = B = None
    objective: list[float] = []
    usage = None
    pending: list[np.ndarray] = []
    for batch in batches:
        batch = np.asarray(batch, dtype=np.float64)
        if W is None:
            # Start from data: the first n_atoms distinct rows seen (seeded pick).
            pending.append(batch)
            pool = np.concatenate(pending)
            if pool.shape[0] < n_atoms:
                continue
            W = unit_rows(pool[rng.choice(pool.shape[0], n_atoms, replace=False)])
            batch = pool
            pending = []
        if A is None:
            A = np.zeros((n_atoms, n_atoms))
            B = np.zeros((n_atoms, W.shape[1]))
            usage = np.zeros(n_atoms, dtype=np.int64)
        Z = code(batch, W, coder, **coder_options).dense()
        resid = batch - Z @ W
        objective.append(float(0.5 * np.mean(np.einsum("ij,ij->i", resid, resid))))
        A *= forget
        B *= forget
        A += Z.T @ Z
        B += Z.T @ batch
        usage += (Z != 0).sum(axis=0)
        W = _update_atoms(W, A, B, batch, rng)
    if W is None:
        raise InputError(problem("training rows", f"at least n_atoms = {n_atoms} rows",
                                 "fewer", "Train on a larger sample or ask for fewer atoms."))
    return LearnedDictionary(
        atoms=W,
        method="online",
        params={
            "coder": coder,
            "coder_options": coder_options,
            "batch_size": batch_size,
            "n_passes": n_passes,
            "forget": forget,
            "seed": seed,
        },
        diagnostics={
            "objective": objective,
            "usage": usage.tolist(),
            "coherence": coherence(W),
        },
    )


def _update_atoms(
    W: np.ndarray, A: np.ndarray, B: np.ndarray, batch: np.ndarray, rng: np.random.Generator
) -> np.ndarray:
    """One sweep of block-coordinate descent over the atoms (rows of ``W``).

    An atom no row has used yet (``A[j, j] == 0``) is replaced by a random row of the
    current batch, so no atom stays dead.
    """
    W = W.copy()
    for j in range(W.shape[0]):  # atoms, not rows: k small updates of length d
        ajj = A[j, j]
        if ajj <= 1e-12:
            W[j] = batch[rng.integers(batch.shape[0])]
        else:
            W[j] += (B[j] - A[j] @ W) / ajj
        norm = np.linalg.norm(W[j])
        if norm > 0:
            W[j] /= norm
    return W
