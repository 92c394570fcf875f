"""k-subspaces: ``L`` blocks of ``s`` orthonormal atoms, one linear subspace each.

Each row is assigned to the block whose subspace captures most of its energy
(largest ``‖U_l x‖²``); each block's basis is then the ``s`` leading eigenvectors of
the scatter ``Σ x xᵀ`` of its rows (the k-subspaces iteration of Ho, Yang, Lim, Lee &
Kriegman, CVPR 2003; also Kambhatla & Leen's local PCA, 1997). The scatters are kept
across mini-batches with forgetting as in ``online``. A block left with no rows in a
window is re-seeded from the worst-represented rows of the batch.

The atoms are returned grouped: rows ``l·s … (l+1)·s − 1`` are block ``l``, and
``params["block_size"]`` is ``s``; the pairing coder, recorded in ``params["coder"]``,
is block OMP with one active group of ``s`` atoms (it picks the block of largest
projection energy, the same rule as the assignment here, and projects on it).

Checkpoints hold ``atoms``, ``scatter`` (L, d, d), ``usage``, ``window``,
``objective``, ``batches_seen``, ``t``, ``n_replaced``, ``rng``; resume follows the
``online`` module's rules.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ...errors import InputError, problem
from ._common import (
    Checkpoint,
    CheckpointClock,
    LearnedDictionary,
    as_rows,
    check_forget,
    check_resume,
    coherence,
    default_forget,
    generator_from_json,
    generator_to_json,
    iter_batches,
    too_few_rows,
    worst_rows,
)

__all__ = ["subspaces"]

_STATE_KEYS = ("atoms", "scatter", "usage", "window", "objective", "batches_seen", "t",
               "n_replaced", "rng")


def subspaces(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    block_size: int = 2,
    batch_size: int = 1024,
    n_passes: int = 1,
    forget: float | None = None,
    replace_every: int = 10,
    seed: int = 0,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 10,
    resume: dict | None = None,
) -> LearnedDictionary:
    """Learn ``n_atoms / block_size`` subspaces of dimension ``block_size``.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
    n_atoms : int
        ``L · s``; must be a multiple of ``block_size``.
    block_size : int
        ``s ≤ d``, the dimension of each subspace.
    batch_size, n_passes, forget, replace_every, seed
        As in ``online`` (a block is re-seeded when no row used it in a window).
    checkpoint, checkpoint_every, resume
        As in ``online``.

    Returns
    -------
    LearnedDictionary
        ``method="subspaces"``, atoms of shape (n_atoms, d) in ``L`` orthonormal blocks.
    """
    s = int(block_size)
    if s < 1 or n_atoms % s:
        raise InputError(problem("block_size", f"a divisor of n_atoms = {n_atoms}", repr(s),
                                 "Ask for n_atoms = number of subspaces × block_size."))
    n_blocks = n_atoms // s
    forget = check_forget(default_forget(source, batch_size, n_passes) if forget is None
                          else forget, allow_zero=True)
    clock = CheckpointClock(checkpoint, checkpoint_every)
    resume = check_resume(resume, "subspaces", _STATE_KEYS)
    if resume is None:
        rng = np.random.default_rng(seed)
        U = C = usage = window = None   # U: (L, s, d) bases; C: (L, d, d) scatters
        objective: list[float] = []
        batches_seen = t = n_replaced = 0
    else:
        rng = generator_from_json(resume["rng"])
        U = np.array(resume["atoms"], dtype=np.float64).reshape(n_blocks, s, -1)
        C = np.array(resume["scatter"], dtype=np.float64)
        usage = np.array(resume["usage"], dtype=np.int64)
        window = np.array(resume["window"], dtype=np.int64)
        objective = [float(v) for v in resume["objective"]]
        batches_seen, t = int(resume["batches_seen"]), int(resume["t"])
        n_replaced = int(resume["n_replaced"])
    if isinstance(source, np.ndarray) and U is None:
        rows = as_rows(source)
        U = _seed_blocks(rows, n_blocks, s, rng)

    def state() -> dict:
        return {"method": "subspaces", "atoms": U.reshape(n_atoms, -1).copy(),
                "scatter": C.copy(), "usage": usage.copy(), "window": window.copy(),
                "objective": np.array(objective), "batches_seen": batches_seen, "t": t,
                "n_replaced": n_replaced, "rng": generator_to_json(rng)}

    pending: list[np.ndarray] = []
    for batch, closes in iter_batches(source, batch_size, n_passes, seed, skip=batches_seen):
        batch = as_rows(batch, width=None if U is None else U.shape[2])
        batches_seen += int(closes)
        if U is None:
            pending.append(batch)
            pool = np.concatenate(pending)
            if pool.shape[0] < n_atoms:
                continue
            U, batch, pending = _seed_blocks(pool, n_blocks, s, rng), pool, []
        d = U.shape[2]
        if s > d:
            raise InputError(problem("block_size", f"at most d = {d}", str(s),
                                     "Use smaller subspaces."))
        if C is None:
            C = np.zeros((n_blocks, d, d))
            usage, window = np.zeros(n_blocks, np.int64), np.zeros(n_blocks, np.int64)
        P = (batch @ U.reshape(n_atoms, d).T) ** 2          # (m, k) squared projections
        captured = P.reshape(-1, n_blocks, s).sum(axis=2)  # (m, L)
        labels = captured.argmax(axis=1)
        energy = np.einsum("ij,ij->i", batch, batch) - captured[np.arange(batch.shape[0]),
                                                                 labels]
        objective.append(float(0.5 * energy.mean()))
        t += 1
        C *= forget
        # Scatter per block: sort rows by block and add one Gram product per block.
        order = np.argsort(labels, kind="stable")
        bounds = np.searchsorted(labels[order], np.arange(n_blocks + 1))
        for l in np.flatnonzero(np.diff(bounds)):  # occupied blocks, not rows
            Xl = batch[order[bounds[l] : bounds[l + 1]]]
            C[l] += Xl.T @ Xl
        used = np.diff(bounds)
        usage += used
        window += used
        lam, V = np.linalg.eigh(C)                         # batched over blocks, ascending
        filled = lam[:, -1] > 0
        U[filled] = np.swapaxes(V[filled][:, :, ::-1][:, :, :s], 1, 2)
        if replace_every and t % replace_every == 0:
            empty = np.flatnonzero(window == 0)
            if empty.size:
                worst = worst_rows(batch, energy, empty.size * s)
                n_new = worst.shape[0] // s
                if n_new:
                    U[empty[:n_new]] = _orthonormal_blocks(worst[: n_new * s], n_new, s)
                    C[empty[:n_new]] = 0.0
                    n_replaced += n_new
            window[:] = 0
        if closes:
            clock.tick(batches_seen, state)
    if U is None or C is None:
        too_few_rows(n_atoms)
    atoms = _signed(U.reshape(n_atoms, -1))
    return LearnedDictionary(
        atoms=atoms,
        method="subspaces",
        params={"coder": "block-omp", "coder_options": {"group_size": s, "n_groups": 1},
                "block_size": s,
                "n_blocks": n_blocks, "batch_size": int(batch_size),
                "n_passes": int(n_passes), "forget": float(forget),
                "replace_every": int(replace_every), "seed": int(seed)},
        diagnostics={"objective": objective, "usage": np.repeat(usage, s).tolist(),
                     "block_usage": usage.tolist(), "coherence": coherence(atoms),
                     "replaced": n_replaced, "batches_seen": batches_seen},
    )


def _seed_blocks(rows: np.ndarray, n_blocks: int, s: int, rng: np.random.Generator) -> np.ndarray:
    """Orthonormal bases (L, s, d) spanned by distinct random rows, ``s`` per block."""
    if rows.shape[0] < n_blocks * s:
        too_few_rows(n_blocks * s)
    picked = rows[rng.choice(rows.shape[0], n_blocks * s, replace=False)]
    return _orthonormal_blocks(picked, n_blocks, s)


def _orthonormal_blocks(rows: np.ndarray, n_blocks: int, s: int) -> np.ndarray:
    """QR of each group of ``s`` rows: (n_blocks · s, d) -> (n_blocks, s, d)."""
    groups = rows.reshape(n_blocks, s, -1)
    Q, _ = np.linalg.qr(np.swapaxes(groups, 1, 2))  # batched: (L, d, s)
    return np.swapaxes(Q, 1, 2)


def _signed(W: np.ndarray) -> np.ndarray:
    """Flip each atom so its largest-magnitude entry is positive (a fixed sign)."""
    signs = np.sign(W[np.arange(W.shape[0]), np.abs(W).argmax(axis=1)])
    return W * np.where(signs == 0, 1.0, signs)[:, None]
