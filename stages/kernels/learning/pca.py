"""Principal directions as atoms (``k ≤ d``).

The atoms are the ``k`` leading eigenvectors of the training rows' covariance
(centred by their mean) or, with ``center=False``, of their second-moment matrix
``Σ x xᵀ / n``. The sums ``n``, ``Σ x`` and ``Σ x xᵀ`` are accumulated batch by batch
in float64, so a stream of any length costs ``O(d²)`` memory and one pass. Each atom's
sign is fixed so that its largest-magnitude entry is positive, which makes the result
a function of the subspace and the data only.

The atoms are orthonormal: coding with OMP and ``k`` nonzeros is the orthogonal
projection. ``diagnostics["objective"]`` holds one value, the share of the total
variance outside the span (``Σ_{i>k} λ_i / Σ λ_i``), and ``explained`` the ``k``
leading eigenvalues.

Checkpoints hold ``n``, ``sum``, ``scatter`` and ``batches_seen``; resume follows the
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
    check_resume,
    coherence,
    iter_batches,
)

__all__ = ["pca"]


def pca(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    center: bool = True,
    batch_size: int = 4096,
    seed: int = 0,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 10,
    resume: dict | None = None,
) -> LearnedDictionary:
    """The ``n_atoms`` leading principal directions.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
    n_atoms : int
        ``k ≤ d``.
    center : bool
        Remove the rows' mean before the eigen-decomposition.
    batch_size : int
        Rows per batch for an in-memory source.
    seed : int
        Unused by the computation (recorded for uniformity with the other learners).
    checkpoint, checkpoint_every, resume
        As in ``online``.

    Returns
    -------
    LearnedDictionary
        ``method="pca"``, orthonormal atoms of shape (n_atoms, d).
    """
    clock = CheckpointClock(checkpoint, checkpoint_every)
    resume = check_resume(resume, "pca", ("n", "sum", "scatter", "batches_seen"))
    if resume is None:
        n, total, scatter, batches_seen = 0, None, None, 0
    else:
        n, batches_seen = int(resume["n"]), int(resume["batches_seen"])
        total = np.array(resume["sum"], dtype=np.float64)
        scatter = np.array(resume["scatter"], dtype=np.float64)

    def state() -> dict:
        return {"method": "pca", "n": n, "sum": total.copy(), "scatter": scatter.copy(),
                "batches_seen": batches_seen}

    for rows, closes in iter_batches(source, batch_size, 1, seed, skip=batches_seen):
        X = as_rows(rows, width=None if total is None else total.shape[0])
        if total is None:
            total, scatter = np.zeros(X.shape[1]), np.zeros((X.shape[1], X.shape[1]))
        n += X.shape[0]
        total += X.sum(axis=0)
        scatter += X.T @ X
        batches_seen += int(closes)
        if closes:
            clock.tick(batches_seen, state)
    if total is None:
        raise InputError(problem("training rows", "at least one row", "none", "Check the source."))
    d = total.shape[0]
    if n_atoms > d:
        raise InputError(problem("n_atoms", f"at most d = {d} principal directions",
                                 str(n_atoms), "Use another method for overcomplete atoms."))
    mean = total / n if center else np.zeros(d)
    cov = scatter / n - np.outer(mean, mean)
    lam, U = np.linalg.eigh(cov)
    lam, U = lam[::-1].clip(0.0), U[:, ::-1]
    atoms = U[:, :n_atoms].T.copy()
    signs = np.sign(atoms[np.arange(n_atoms), np.abs(atoms).argmax(axis=1)])
    atoms *= signs[:, None]
    outside = float(lam[n_atoms:].sum() / lam.sum()) if lam.sum() > 0 else 0.0
    return LearnedDictionary(
        atoms=atoms,
        method="pca",
        params={"coder": "omp", "coder_options": {"n_nonzero": int(n_atoms)},
                "center": bool(center), "batch_size": int(batch_size), "seed": int(seed)},
        diagnostics={"objective": [outside], "usage": [],
                     "explained": lam[:n_atoms].tolist(), "coherence": coherence(atoms),
                     "replaced": 0, "batches_seen": batches_seen},
    )
