"""Batch alternating minimisation whose statistics are sums over chunks.

One iteration codes *every* training row with the current atoms, then minimises
``½ Σ‖x − Wᵀz‖²`` over unit-norm atoms with the codes fixed. The atom step needs only
the sums ``A = Σ z zᵀ`` (k, k) and ``B = Σ z xᵀ`` (k, d) — the method of optimal
directions of Engan, Aase & Husøy (ICASSP 1999), solved here under the unit-norm
constraint by block-coordinate sweeps (as in ``online``) instead of the
unconstrained ``A⁻¹B`` — so a flow can compute them chunk by chunk, in parallel:

>>> stats = [batch_statistics(chunk, atoms, "omp", {"n_nonzero": 5}) for chunk in chunks]
>>> atoms = batch_update(atoms, combine_statistics(stats))      # doctest: +SKIP

:func:`batch` runs the same three functions over an in-memory array (cut into
``chunk_size`` rows) or over a *re-iterable* stream (iterated once per pass, e.g. an
object whose ``__iter__`` re-reads the Zarr chunks). Atoms no row used, and duplicates,
are replaced by the worst-coded rows, which the statistics carry along (at most ``k``
per chunk, merged by keeping the worst ``k``).

Checkpoints: here a checkpoint is taken every ``checkpoint_every`` *passes*; the state
holds ``atoms``, ``objective``, ``usage``, ``passes_done`` (and ``batches_seen`` = passes
× chunks per pass for reference). Resume repeats no finished pass and needs no skipping
by the caller: each pass re-reads the whole source.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Iterable

import numpy as np

from ...errors import InputError, problem
from ._common import (
    Checkpoint,
    CheckpointClock,
    LearnedDictionary,
    as_rows,
    atoms_from_rows,
    atom_usage,
    bcd_sweep,
    check_resume,
    coded,
    coherence,
    default_coder_options,
    replace_atoms,
    unit_rows,
)

__all__ = ["batch", "batch_statistics", "combine_statistics", "batch_update"]

_STATE_KEYS = ("atoms", "objective", "usage", "passes_done")


def batch_statistics(
    rows: np.ndarray, atoms: np.ndarray, coder: str = "omp", coder_options: dict | None = None
) -> dict:
    """Sufficient statistics of one chunk for the atom update.

    Parameters
    ----------
    rows : ndarray of shape (m, d)
        A chunk of preprocessed training rows.
    atoms : ndarray of shape (k, d)
        Current atoms.
    coder : str
        Any coder name ``atomline.stages.kernels.coding.code`` accepts.
    coder_options : dict, optional
        Its options (default ``{"n_nonzero": 5}`` for OMP).

    Returns
    -------
    dict
        ``A`` ndarray (k, k) ``Σ z zᵀ``; ``B`` ndarray (k, d) ``Σ z xᵀ``; ``usage``
        ndarray (k,) int64, rows using each atom; ``energy`` float ``Σ‖x − Wᵀz‖²``;
        ``n_rows`` int; ``worst`` ndarray (≤ k, d) the chunk's worst-coded rows and
        ``worst_energy`` ndarray (≤ k,) their residual energy, worst first.
    """
    X = as_rows(rows, "chunk rows")
    W = as_rows(atoms, "atoms", X.shape[1])
    Z = coded(X, W, coder, default_coder_options(coder, coder_options))
    R = X - Z @ W  # sparse (m, k) @ dense (k, d): a dense array
    energy = np.einsum("ij,ij->i", R, R)
    order = np.argsort(-energy, kind="stable")[: W.shape[0]]
    return {"A": (Z.T @ Z).toarray(), "B": Z.T @ X, "usage": atom_usage(Z),
            "energy": float(energy.sum()), "n_rows": int(X.shape[0]),
            "worst": X[order], "worst_energy": energy[order]}


def combine_statistics(parts: Iterable[dict]) -> dict:
    """Merge chunk statistics: sums of ``A, B, usage, energy, n_rows``; the worst ``k`` rows.

    Parameters
    ----------
    parts : iterable of dict
        Outputs of :func:`batch_statistics` for one set of atoms.

    Returns
    -------
    dict
        Same fields as one chunk's statistics.
    """
    parts = list(parts)
    if not parts:
        raise InputError(problem("chunk statistics", "at least one chunk", "none",
                                 "Compute batch_statistics on every chunk first."))
    k = parts[0]["A"].shape[0]
    worst = np.concatenate([p["worst"] for p in parts])
    worst_energy = np.concatenate([p["worst_energy"] for p in parts])
    order = np.argsort(-worst_energy, kind="stable")[:k]
    return {"A": sum(p["A"] for p in parts), "B": sum(p["B"] for p in parts),
            "usage": sum(p["usage"] for p in parts),
            "energy": float(sum(p["energy"] for p in parts)),
            "n_rows": int(sum(p["n_rows"] for p in parts)),
            "worst": worst[order], "worst_energy": worst_energy[order]}


def batch_update(
    atoms: np.ndarray,
    stats: dict,
    *,
    n_sweeps: int = 5,
    dead_share: float = 0.15,
    duplicate_cos: float = 0.98,
) -> np.ndarray:
    """New atoms from the combined statistics of one pass.

    Parameters
    ----------
    atoms : ndarray of shape (k, d)
        The atoms the statistics were computed with.
    stats : dict
        :func:`combine_statistics` of all chunks (or one chunk's statistics).
    n_sweeps : int
        Block-coordinate sweeps over the atoms.
    dead_share : float
        Atoms used by fewer than this share of the mean usage are replaced.
    duplicate_cos : float
        Atoms with |cos| above this to an earlier atom are replaced.

    Returns
    -------
    ndarray of shape (k, d)
        Unit-norm atoms.
    """
    return _update(atoms, stats, n_sweeps, dead_share, duplicate_cos)[0]


def _update(
    atoms: np.ndarray, stats: dict, n_sweeps: int, dead_share: float, duplicate_cos: float
) -> tuple[np.ndarray, np.ndarray]:
    W = bcd_sweep(unit_rows(np.asarray(atoms, dtype=np.float64)), stats["A"], stats["B"],
                  n_sweeps)
    usage = np.asarray(stats["usage"])
    dead = usage < dead_share * usage.mean()
    return replace_atoms(W, dead, stats["worst"], duplicate_cos)


def batch(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    coder: str = "omp",
    coder_options: dict | None = None,
    n_passes: int = 10,
    chunk_size: int = 4096,
    n_sweeps: int = 5,
    dead_share: float = 0.15,
    duplicate_cos: float = 0.98,
    seed: int = 0,
    init: np.ndarray | None = None,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 1,
    resume: dict | None = None,
) -> LearnedDictionary:
    """Learn ``n_atoms`` atoms by ``n_passes`` alternating-minimisation iterations.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or re-iterable of ndarrays of shape (m, d)
        Training rows, already preprocessed; a stream is iterated once per pass.
    n_atoms : int
        ``k``.
    coder, coder_options
        The inner-loop coder (default OMP with 5 nonzeros).
    n_passes : int
        Iterations (each one full pass).
    chunk_size : int
        Rows per chunk for an in-memory source (results do not depend on it beyond
        floating-point summation order).
    n_sweeps, dead_share, duplicate_cos
        See :func:`batch_update`.
    seed : int
        Seeds the initial atoms (drawn rows).
    init : ndarray of shape (n_atoms, d), optional
    checkpoint : callable, optional
        Called with the state every ``checkpoint_every`` passes.
    checkpoint_every : int
    resume : dict, optional

    Returns
    -------
    LearnedDictionary
        ``method="batch"``; ``diagnostics["objective"]`` holds, per pass, the mean of
        ``½‖x − Wᵀz‖²`` over all rows coded with the atoms before that pass's update.
    """
    if isinstance(source, Iterator):  # generators, iter(list): readable once only
        raise InputError(problem("training stream", "an array or a re-iterable source "
                                 "(read once per pass)", "a one-shot iterator",
                                 "Pass a list of batches or an object whose __iter__ "
                                 "re-reads the chunks."))
    coder_options = default_coder_options(coder, coder_options)
    clock = CheckpointClock(checkpoint, checkpoint_every)
    resume = check_resume(resume, "batch", _STATE_KEYS)
    chunks = _Chunks(source, chunk_size)
    if resume is not None:
        W = np.array(resume["atoms"], dtype=np.float64)
        objective = [float(v) for v in resume["objective"]]
        usage = np.array(resume["usage"], dtype=np.int64)
        done = int(resume["passes_done"])
    else:
        W = unit_rows(as_rows(init, "init")) if init is not None else _first_rows(
            chunks, n_atoms, seed)
        objective, usage, done = [], np.zeros(n_atoms, dtype=np.int64), 0
    n_replaced, n_chunks = 0, 0

    def state() -> dict:
        return {"method": "batch", "atoms": W.copy(), "objective": np.array(objective),
                "usage": usage.copy(), "passes_done": done,
                "batches_seen": done * n_chunks}

    while done < n_passes:
        parts = [batch_statistics(rows, W, coder, coder_options) for rows in chunks]
        if not parts:
            raise InputError(problem("training stream", "rows on every pass", "none",
                                     "Pass a source whose __iter__ re-reads the rows."))
        n_chunks = len(parts)
        stats = combine_statistics(parts)
        objective.append(0.5 * stats["energy"] / stats["n_rows"])
        usage = stats["usage"]
        W, gone = _update(W, stats, n_sweeps, dead_share, duplicate_cos)
        n_replaced += int(gone.size)
        done += 1
        clock.tick(done, state)
    return LearnedDictionary(
        atoms=W,
        method="batch",
        params={"coder": coder, "coder_options": coder_options, "n_passes": int(n_passes),
                "chunk_size": int(chunk_size), "n_sweeps": int(n_sweeps),
                "dead_share": float(dead_share), "duplicate_cos": float(duplicate_cos),
                "seed": int(seed)},
        diagnostics={"objective": objective, "usage": usage.tolist(),
                     "coherence": coherence(W), "replaced": n_replaced,
                     "passes_done": done},
    )


class _Chunks:
    """Iterates an array in fixed chunks, or a stream as given, once per ``iter``."""

    def __init__(self, source: np.ndarray | Iterable[np.ndarray], chunk_size: int) -> None:
        self.source, self.chunk_size = source, int(chunk_size)

    def __iter__(self):
        if isinstance(self.source, np.ndarray):
            rows = as_rows(self.source)
            for start in range(0, rows.shape[0], self.chunk_size):
                yield rows[start : start + self.chunk_size]
        else:
            yield from self.source


def _first_rows(chunks: _Chunks, n_atoms: int, seed: int) -> np.ndarray:
    """``n_atoms`` distinct rows drawn from all rows in memory, else the leading chunks."""
    pool: list[np.ndarray] = []
    if isinstance(chunks.source, np.ndarray):
        chunks = [chunks.source]
    have = 0
    for rows in chunks:
        pool.append(as_rows(rows))
        have += pool[-1].shape[0]
        if have >= n_atoms:
            break
    return atoms_from_rows(np.concatenate(pool), n_atoms, np.random.default_rng(seed))
