"""Sparse coders: one public entry point, one module per algorithm.

Every coder takes a chunk of rows ``X`` (n_rows, d) and a fixed dictionary ``atoms``
(k, d), works on all rows at once, and returns the fixed-width layout
:class:`SparseCodes` (``index``/``value``/``count``) that the workspace stores; call
``.dense()`` for an (n_rows, k) array.

Example
-------
>>> import numpy as np
>>> from atomline.stages.coding import code
>>> rng = np.random.default_rng(0)
>>> atoms = rng.standard_normal((32, 16)); atoms /= np.linalg.norm(atoms, axis=1, keepdims=True)
>>> X = 2.0 * atoms[3] - 0.5 * atoms[7]
>>> codes = code(X[None, :], atoms, "omp", n_nonzero=2)
>>> sorted(codes.index[0].tolist()), np.round(codes.dense()[0, [3, 7]], 6).tolist()
([3, 7], [2.0, -0.5])

Methods
-------
``omp``
    Orthogonal matching pursuit (greedy, L0): options ``n_nonzero``, ``tol``, ``gram``.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np

from ..errors import InputError, problem
from ._common import SparseCodes, check_problem, gram
from .omp import omp

__all__ = ["code", "code_width", "METHODS", "SparseCodes", "gram"]

#: Coders by their trade name. Each takes validated ``(X, atoms, **options)``.
METHODS: dict[str, Callable[..., SparseCodes]] = {
    "omp": omp,
}


def code(X: np.ndarray, atoms: np.ndarray, method: str = "omp", **options: Any) -> SparseCodes:
    """Sparse-code the rows of ``X`` over a dictionary.

    Parameters
    ----------
    X : array_like of shape (n_rows, d), float32 or float64
        Rows to code (already preprocessed like the dictionary's training data).
    atoms : array_like of shape (k, d)
        The dictionary, one atom per row; cast to the dtype of ``X``.
    method : str
        A key of :data:`METHODS`.
    **options
        The method's own options (see the module docstring).

    Returns
    -------
    SparseCodes
        Codes of shape (n_rows, width) with ``.dense()`` of shape (n_rows, k).

    Raises
    ------
    InputError
        Unknown method or option, or an invalid problem (see ``check_problem``).
    """
    if method not in METHODS:
        raise InputError(problem("coding method", f"one of {sorted(METHODS)}",
                                 repr(method), "Pick a listed method."))
    X, atoms = check_problem(X, atoms)
    try:
        return METHODS[method](X, atoms, **options)
    except TypeError as exc:  # unknown or missing keyword: say which method wanted what
        raise InputError(problem(f"options of coder {method!r}", "the method's own options",
                                 str(exc), "See atomline.stages.coding's docstring.")) from exc


def code_width(method: str, n_atoms: int, **options: Any) -> int:
    """Largest number of slots per row that ``method`` can return with ``options``.

    The encode stage sizes its fixed-width Zarr arrays with this.

    Parameters
    ----------
    method : str
    n_atoms : int
        ``k``.
    **options
        As for :func:`code`.

    Returns
    -------
    int
    """
    if method == "omp":
        return int(min(options["n_nonzero"], n_atoms))
    raise InputError(problem("coding method", f"one of {sorted(METHODS)}", repr(method),
                             "Pick a listed method."))
