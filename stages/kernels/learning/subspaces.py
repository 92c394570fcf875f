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

Checkpoints hold ``atoms``, ``scatter`` (L, d, d) and the shared driver's fields
(:mod:`._driver`); resume follows the ``online`` module's rules.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ...errors import InputError, problem
from ._common import (
    Checkpoint,
    LearnedDictionary,
    check_forget,
    default_forget,
    too_few_rows,
    worst_rows,
)
from ._driver import DRIVER_KEYS, Step, run_minibatch

__all__ = ["subspaces"]

_STATE_KEYS = ("atoms", "scatter", *DRIVER_KEYS, "rng")


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
    learner = _Subspaces(n_blocks, s, forget)
    run = run_minibatch(learner, source, n_atoms, method="subspaces", state_keys=_STATE_KEYS,
                        batch_size=batch_size, n_passes=n_passes, replace_every=replace_every,
                        seed=seed, checkpoint=checkpoint, checkpoint_every=checkpoint_every,
                        resume=resume)
    U, usage = learner.U, run.usage
    atoms = _signed(U.reshape(n_atoms, -1))
    return LearnedDictionary(
        atoms=atoms,
        method="subspaces",
        params={"coder": "block-omp", "coder_options": {"group_size": s, "n_groups": 1},
                "block_size": s,
                "n_blocks": n_blocks, "batch_size": int(batch_size),
                "n_passes": int(n_passes), "forget": float(forget),
                "replace_every": int(replace_every), "seed": int(seed)},
        # The driver counts rows per block; each atom of a block is used by its rows.
        diagnostics={**run.diagnostics(atoms), "usage": np.repeat(usage, s).tolist(),
                     "block_usage": usage.tolist()},
    )


class _Subspaces(Step):
    """Bases ``U`` (L, s, d) and forgetful scatters ``C`` (L, d, d), one per block; the
    driver's usage counts rows per block."""

    def __init__(self, n_blocks, s, forget) -> None:
        self.n_units, self.s, self.forget = n_blocks, s, forget
        self.U = self.C = None

    @property
    def width(self) -> int | None:
        return None if self.U is None else self.U.shape[2]

    def start(self, rows, rng):
        self.U = _seed_blocks(rows, self.n_units, self.s, rng)

    def begin(self):
        d = self.U.shape[2]
        if self.s > d:
            raise InputError(problem("block_size", f"at most d = {d}", str(self.s),
                                     "Use smaller subspaces."))
        self.C = np.zeros((self.n_units, d, d))

    def update(self, batch, t):
        n_blocks, s, U, C = self.n_units, self.s, self.U, self.C
        P = (batch @ U.reshape(n_blocks * s, -1).T) ** 2    # (m, k) squared projections
        captured = P.reshape(-1, n_blocks, s).sum(axis=2)  # (m, L)
        labels = captured.argmax(axis=1)
        energy = np.einsum("ij,ij->i", batch, batch) - captured[np.arange(batch.shape[0]),
                                                                 labels]
        C *= self.forget
        # Scatter per block: sort rows by block and add one Gram product per block.
        order = np.argsort(labels, kind="stable")
        bounds = np.searchsorted(labels[order], np.arange(n_blocks + 1))
        for l in np.flatnonzero(np.diff(bounds)):  # occupied blocks, not rows
            Xl = batch[order[bounds[l] : bounds[l + 1]]]
            C[l] += Xl.T @ Xl
        lam, V = np.linalg.eigh(C)                         # batched over blocks, ascending
        filled = lam[:, -1] > 0
        U[filled] = np.swapaxes(V[filled][:, :, ::-1][:, :, :s], 1, 2)
        return energy, np.diff(bounds)

    def refresh(self, batch, energy, window):
        empty = np.flatnonzero(window == 0)
        if not empty.size:
            return 0
        worst = worst_rows(batch, energy, empty.size * self.s)
        n_new = worst.shape[0] // self.s
        if n_new:
            self.U[empty[:n_new]] = _orthonormal_blocks(worst[: n_new * self.s], n_new, self.s)
            self.C[empty[:n_new]] = 0.0
        return n_new

    def state(self):
        return {"atoms": self.U.reshape(self.n_units * self.s, -1).copy(),
                "scatter": self.C.copy()}

    def restore(self, state):
        self.U = np.array(state["atoms"], dtype=np.float64).reshape(self.n_units, self.s, -1)
        self.C = np.array(state["scatter"], dtype=np.float64)


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
