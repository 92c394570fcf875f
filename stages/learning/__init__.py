"""Dictionary learners: one public entry point, one module per algorithm.

Example
-------
>>> import numpy as np
>>> from atomline.stages.learning import learn
>>> rows = np.random.default_rng(0).standard_normal((2000, 16))
>>> learned = learn(rows, 24, "online", coder_options={"n_nonzero": 3}, seed=1)
>>> learned.atoms.shape, bool(np.allclose(np.linalg.norm(learned.atoms, axis=1), 1))
((24, 16), True)

Methods
-------
``online``
    Mini-batch learning with accumulated statistics and block-coordinate atom updates.
"""

from __future__ import annotations

import itertools
from typing import Any, Callable, Iterable, Iterator

import numpy as np

from ..errors import InputError, problem
from ..prep import Normaliser
from ._common import LearnedDictionary
from .online import online

__all__ = ["learn", "METHODS", "LearnedDictionary"]

#: Learners by their trade name. Each takes ``(source, n_atoms, **options)``.
METHODS: dict[str, Callable[..., LearnedDictionary]] = {
    "online": online,
}


def learn(
    source: np.ndarray | Iterable[np.ndarray],
    n_atoms: int,
    method: str = "online",
    *,
    preprocessing: Normaliser | None = None,
    **options: Any,
) -> LearnedDictionary:
    """Learn a dictionary of ``n_atoms`` atoms.

    Parameters
    ----------
    source : ndarray of shape (n_rows, d), or iterable of ndarrays of shape (m, d)
        Preprocessed training rows, in memory or streamed as mini-batches.
    n_atoms : int
        ``k``, the number of atoms.
    method : str
        A key of :data:`METHODS`.
    preprocessing : Normaliser, optional
        Unfitted preprocessing: fitted on the in-memory rows (or on the first
        mini-batch of a stream), applied to every row before learning, and returned
        fitted on the result.
    **options
        The learner's own options (see its module).

    Returns
    -------
    LearnedDictionary
        Atoms of shape (n_atoms, d) and diagnostics.
    """
    if method not in METHODS:
        raise InputError(problem("learning method", f"one of {sorted(METHODS)}",
                                 repr(method), "Pick a listed method."))
    if int(n_atoms) < 1:
        raise InputError(problem("n_atoms", "a positive integer", repr(n_atoms),
                                 "Ask for at least one atom."))
    fitted = None
    if preprocessing is not None:
        fitted, source = _fit_preprocessing(preprocessing, source)
    try:
        result = METHODS[method](source, int(n_atoms), **options)
    except TypeError as exc:
        raise InputError(problem(f"options of learner {method!r}", "the method's own options",
                                 str(exc), "See atomline.stages.learning's docstring.")) from exc
    result.preprocessing = fitted
    return result


def _fit_preprocessing(
    preprocessing: Normaliser, source: np.ndarray | Iterable[np.ndarray]
) -> tuple[Normaliser, np.ndarray | Iterator[np.ndarray]]:
    """Fit on the rows in memory, or on the first batch of a stream, and apply."""
    if isinstance(source, np.ndarray):
        fitted = preprocessing.fit(source)
        return fitted, fitted.apply(source)
    stream = iter(source)
    first = np.asarray(next(stream))
    fitted = preprocessing.fit(first)
    return fitted, (fitted.apply(np.asarray(b)) for b in itertools.chain([first], stream))
