"""Random training rows as atoms: the baseline dictionary.

``n_atoms`` rows drawn uniformly from the whole source in one pass (the reservoir of
:mod:`.reservoir`), scaled to unit norm. A learned dictionary should beat it; Coates &
Ng (ICML 2011) found it a surprisingly strong baseline for features, which is why it is
a first-class method rather than only an initialisation.

Rows of zero norm cannot be atoms; they are offered to the reservoir like any other
row, and the result is refused if one was drawn (preprocess to remove flat rows).
Checkpoints hold the reservoir (``reservoir_*`` fields) and ``batches_seen``; resume
follows the ``online`` module's rules.
"""

from __future__ import annotations

from typing import Iterable

import numpy as np

from ...errors import InputError, problem
from ._common import (
    Checkpoint,
    CheckpointClock,
    LearnedDictionary,
    check_resume,
    coherence,
    default_coder_options,
    too_few_rows,
    unit_rows,
)
from .reservoir import Reservoir

__all__ = ["random_patches"]


def random_patches(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    *,
    coder: str = "omp",
    coder_options: dict | None = None,
    batch_size: int = 4096,
    seed: int = 0,
    checkpoint: Checkpoint | None = None,
    checkpoint_every: int = 10,
    resume: dict | None = None,
) -> LearnedDictionary:
    """Draw ``n_atoms`` rows uniformly and normalise them.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
    n_atoms : int
    coder, coder_options
        The coder the atoms are meant for (recorded; used for the diagnostics).
    batch_size : int
        Rows per batch for an in-memory source.
    seed : int
    checkpoint, checkpoint_every, resume
        As in ``online``.

    Returns
    -------
    LearnedDictionary
        ``method="random-patches"``, atoms of shape (n_atoms, d).
    """
    coder_options = default_coder_options(coder, coder_options)
    clock = CheckpointClock(checkpoint, checkpoint_every)
    keys = ("batches_seen", "reservoir_rows", "reservoir_keys", "reservoir_order",
            "reservoir_seen", "reservoir_rng")
    resume = check_resume(resume, "random-patches", keys)
    if resume is None:
        reservoir, batches_seen = Reservoir(n_atoms, seed), 0
    else:
        reservoir = Reservoir.from_state(n_atoms, resume)
        batches_seen = int(resume["batches_seen"])

    def state() -> dict:
        return {"method": "random-patches", "batches_seen": batches_seen, **reservoir.state()}

    # In memory the order of rows is irrelevant to a uniform draw: read in place.
    # A stream is read as given (on resume the caller starts it at batches_seen).
    batches = (_in_order(source, batch_size, batches_seen)
               if isinstance(source, np.ndarray) else source)
    for rows in batches:
        reservoir.add(rows)
        batches_seen += 1
        clock.tick(batches_seen, state)
    drawn = reservoir.sample()
    if drawn.shape[0] < n_atoms:
        too_few_rows(n_atoms)
    if not (np.linalg.norm(drawn, axis=1) > 0).all():
        raise InputError(problem("random patches", "rows of nonzero norm", "a zero row drawn",
                                 "Remove flat rows (e.g. with contrast normalisation)."))
    atoms = unit_rows(drawn)
    return LearnedDictionary(
        atoms=atoms,
        method="random-patches",
        params={"coder": coder, "coder_options": coder_options,
                "batch_size": int(batch_size), "seed": int(seed)},
        diagnostics={"objective": [], "usage": [], "coherence": coherence(atoms),
                     "replaced": 0, "batches_seen": batches_seen},
    )


def _in_order(rows: np.ndarray, batch_size: int, skip: int):
    for b, start in enumerate(range(0, rows.shape[0], batch_size)):
        if b >= skip:
            yield rows[start : start + batch_size]
