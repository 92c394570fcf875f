"""Shared pieces of the dictionary learners: the result object and batch handling."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable, Iterator

import numpy as np

from ..errors import InputError, problem
from ..prep import Normaliser

__all__ = ["LearnedDictionary", "iter_batches", "unit_rows"]


@dataclass
class LearnedDictionary:
    """A trained dictionary and what is known about it.

    Attributes
    ----------
    atoms : ndarray of shape (k, d)
        Unit-norm atoms, one per row.
    method : str
        The learner's trade name.
    params : dict
        The options the learner ran with (plain JSON types).
    diagnostics : dict
        Plain-JSON facts about the result: ``objective`` (trace, one value per
        mini-batch or pass), ``usage`` (how many training rows used each atom),
        ``coherence`` (largest |cos| between two atoms).
    preprocessing : Normaliser or None
        The fitted preprocessing; rows must pass through ``preprocessing.apply`` before
        they are coded with these atoms. ``None`` when the learner saw rows as given.
    """

    atoms: np.ndarray
    method: str
    params: dict = field(default_factory=dict)
    diagnostics: dict = field(default_factory=dict)
    preprocessing: Normaliser | None = None

    @property
    def n_atoms(self) -> int:
        """``k``."""
        return int(self.atoms.shape[0])

    @property
    def n_features(self) -> int:
        """``d``."""
        return int(self.atoms.shape[1])


def unit_rows(W: np.ndarray) -> np.ndarray:
    """Scale each row to unit Euclidean norm (zero rows stay zero).

    Parameters
    ----------
    W : ndarray of shape (k, d)

    Returns
    -------
    ndarray of shape (k, d)
    """
    norms = np.linalg.norm(W, axis=1, keepdims=True)
    return W / np.where(norms > 0, norms, 1)


def coherence(W: np.ndarray) -> float:
    """Mutual coherence: the largest |cos| between two distinct atoms.

    Parameters
    ----------
    W : ndarray of shape (k, d), unit rows

    Returns
    -------
    float
    """
    G = np.abs(W @ W.T)
    np.fill_diagonal(G, 0)
    return float(G.max(initial=0.0))


def iter_batches(
    source: np.ndarray | Iterable[np.ndarray], batch_size: int, n_passes: int, seed: int
) -> Iterator[np.ndarray]:
    """Yield mini-batches (rows, d) from an array or from an iterable of batches.

    An in-memory array is shuffled once per pass with a seeded generator and cut into
    ``batch_size`` rows; an iterable is consumed as given (the caller streams it, e.g.
    from Zarr) and ``n_passes`` is ignored.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
    batch_size : int
    n_passes : int
    seed : int

    Yields
    ------
    ndarray of shape (m, d)
    """
    if isinstance(source, np.ndarray):
        if source.ndim != 2 or source.shape[0] == 0:
            raise InputError(problem("training rows", "a non-empty 2-D array (rows, d)",
                                     f"shape {source.shape}", "Pass patches as rows."))
        rng = np.random.default_rng(seed)
        for _ in range(n_passes):
            order = rng.permutation(source.shape[0])
            for start in range(0, len(order), batch_size):
                yield source[np.sort(order[start : start + batch_size])]
    else:
        yield from source
