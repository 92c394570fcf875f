"""Sparse coders: one public entry point, one module per algorithm.

Every coder takes a chunk of rows ``X`` (n_rows, d) and a fixed dictionary ``atoms``
(k, d), works on all rows at once, and returns the fixed-width layout
:class:`SparseCodes` (``index``/``value``/``count``) that the workspace stores; call
``.dense()`` for an (n_rows, n_atoms) array. Each row is coded on its own (no stopping
rule is shared across rows), so a chunk coded in pieces gives the same bytes as in one
call. Coders work in the dtype of ``X`` (float32 or float64).

Example
-------
>>> import numpy as np
>>> from atomline.stages.kernels.coding import code
>>> rng = np.random.default_rng(0)
>>> atoms = rng.standard_normal((32, 16)); atoms /= np.linalg.norm(atoms, axis=1, keepdims=True)
>>> X = 2.0 * atoms[3] - 0.5 * atoms[7]
>>> codes = code(X[None, :], atoms, "omp", n_nonzero=2)
>>> sorted(codes.index[0].tolist()), np.round(codes.dense()[0, [3, 7]], 6).tolist()
([3, 7], [2.0, -0.5])

Choosing a coder (common practice)
----------------------------------
Greedy coders (``mp``, ``omp``, ``ormp``, ``cosamp``) suit very few nonzeros per row,
about 10 or fewer; beyond that, the lasso coders (``lars``, ``fista``, ``ista``) scale
better and give codes that vary smoothly with the input. Among greedy coders ORMP is
more accurate than OMP, which is much more accurate than MP; the order of speed is the
reverse (MP fastest). The cheap encoders (``threshold``, ``triangle``, ``hard``) cost one
product and suit large dictionaries learned for them; ``learned`` approximates a slower
coder with a few trained layers.

Methods and their options
-------------------------
``mp``
    Matching pursuit: ``n_nonzero`` (distinct atoms), ``tol``, ``max_steps``, ``gram``.
``omp``
    Orthogonal matching pursuit: ``n_nonzero``, ``tol`` (relative residual energy
    ``‖r‖² ≤ tol·‖x‖²``), ``gram``.
``ormp``
    Order-recursive matching pursuit: as ``omp``.
``cosamp``
    Compressive sampling matching pursuit: ``n_nonzero``, ``tol``, ``max_iter``, ``gram``.
``lars``
    Exact lasso by the LARS homotopy: ``lam``, ``positive``, ``max_nonzero``, ``gram``.
``ista`` / ``fista``
    Proximal gradient for the lasso: ``lam``, ``positive``, ``init`` (warm start),
    ``max_iter``, ``gap_tol`` (relative duality gap per row), ``max_nonzero``, ``gram``;
    ``fista`` adds momentum with adaptive restart.
``threshold``
    Soft threshold of ``W x``: ``alpha`` (offset), ``split_sign`` (outputs
    ``max(0, c − alpha)`` as atom ``j`` and ``max(0, −c − alpha)`` as atom ``k + j``:
    ``n_atoms`` of the codes is then ``2k``, the width stays ``k``).
``triangle``
    k-means "triangle" activation: no options.
``hard``
    Hard assignment to the nearest atom: no options.
``block-omp``
    Block OMP over consecutive groups of atoms: ``group_size``, ``n_groups`` (active
    groups), ``tol``, ``gram``.
``learned``
    Unrolled, trained ISTA (LISTA): ``encoder`` from :func:`fit_learned_encoder`,
    ``max_nonzero``.

The lasso objective is ``½‖x − Wᵀz‖² + lam·‖z‖₁`` with ``W`` the atoms (k, d).

Helpers
-------
:func:`code_width` gives the slots per row a coder returns from its options alone (for
sizing fixed-width stores); :meth:`SparseCodes.limit` cuts codes to fewer slots and
says how many rows lost nonzeros; :func:`lambda_for_sparsity` picks ``lam`` for a target
mean number of nonzeros; :func:`fit_learned_encoder` trains the ``learned`` coder and
:class:`LearnedEncoder` stores it (``arrays()``/``attrs()``/``from_stored``).

Implementation notes
--------------------
Per-row algorithms run inside numba-compiled kernels (``cache=True``: compiled once per
machine, about a second per kernel and dtype, then loaded from the user cache; see
``_numba_cache``), single threaded so that worker processes × threads stay within the cores,
and without the GIL so that worker threads of one process code their batches at once. The one product
with the dictionary goes through :func:`._common.correlations`, which calls BLAS with a
fixed block shape so that a row's result never depends on the other rows of its chunk.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np

from ...errors import InputError, problem
from ._numba_cache import use_user_cache_dir

# Before any kernel is decorated: the decorator picks the cache location.
use_user_cache_dir()

from ._common import (SparseCodes, check_problem, gram, keyword_options,  # noqa: E402
                      refuse_unknown_options)
from .block_omp import block_omp, block_omp_width
from .cosamp import cosamp, cosamp_width
from .fista import fista
from .ista import ista
from .lars import lars, lasso_width
from .mp import mp, mp_width
from .omp import omp, omp_width
from .hard import hard, hard_width
from .learned import LearnedEncoder, fit_learned_encoder, learned, learned_width
from .ormp import ormp, ormp_width
from .sparsity import lambda_for_sparsity
from .threshold import threshold, threshold_width
from .triangle import triangle, triangle_width

__all__ = [
    "code",
    "code_width",
    "code_outputs",
    "METHODS",
    "SparseCodes",
    "gram",
    "LearnedEncoder",
    "fit_learned_encoder",
    "lambda_for_sparsity",
]

#: Coders by their trade name. Each takes validated ``(X, atoms, **options)``.
METHODS: dict[str, Callable[..., SparseCodes]] = {
    "mp": mp,
    "omp": omp,
    "ormp": ormp,
    "cosamp": cosamp,
    "lars": lars,
    "ista": ista,
    "fista": fista,
    "threshold": threshold,
    "triangle": triangle,
    "hard": hard,
    "block-omp": block_omp,
    "learned": learned,
}

#: Slots per row each coder returns, from ``(n_atoms, **options)``.
_WIDTHS: dict[str, Callable[..., int]] = {
    "mp": mp_width,
    "omp": omp_width,
    "ormp": ormp_width,
    "cosamp": cosamp_width,
    "lars": lasso_width,
    "ista": lasso_width,
    "fista": lasso_width,
    "threshold": threshold_width,
    "triangle": triangle_width,
    "hard": hard_width,
    "block-omp": block_omp_width,
    "learned": learned_width,
}


def _unknown(method: str) -> InputError:
    return InputError(problem("coding method", f"one of {sorted(METHODS)}",
                              repr(method), "Pick a listed method."))


def _bad_options(method: str, exc: TypeError) -> InputError:
    return InputError(problem(f"options of coder {method!r}", "the method's own options",
                              str(exc), "See atomline.stages.kernels.coding's docstring."))


def _check_option_names(method: str, options: dict) -> None:
    """Refuse option names the coder does not take, listing those it does (every coder's
    options are keyword-only parameters, so its signature is the list)."""
    refuse_unknown_options(f"coder {method!r}", options, keyword_options(METHODS[method]), "--coder")


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
        Codes of shape (n_rows, ``code_width(method, k, **options)``) with ``.dense()``
        of shape (n_rows, n_atoms) (``n_atoms`` is ``2k`` for split-sign thresholding).

    Raises
    ------
    InputError
        Unknown method or option, or an invalid problem (see ``check_problem``).
    """
    if method not in METHODS:
        raise _unknown(method)
    X, atoms = check_problem(X, atoms)
    try:
        return METHODS[method](X, atoms, **options)
    except TypeError as exc:  # unknown or missing keyword: say which method wanted what
        raise _bad_options(method, exc) from exc


def code_width(method: str, n_atoms: int, **options: Any) -> int:
    """The number of slots per row ``code(X, atoms, method, **options)`` returns.

    It depends only on the method, the number of atoms and the options, never on the
    rows, so fixed-width stores can be sized before any chunk is coded.

    Parameters
    ----------
    method : str
        A key of :data:`METHODS`.
    n_atoms : int
        ``k``, the number of atoms.
    **options
        The options that will be passed to :func:`code`.

    Returns
    -------
    int
        Slots per row (greedy: ``n_nonzero``; lasso: ``max_nonzero`` or ``k``;
        threshold: ``k`` or ``2k`` with ``split_sign``; hard: 1; ...).
    """
    if method not in _WIDTHS:
        raise _unknown(method)
    _check_option_names(method, options)
    try:
        return int(_WIDTHS[method](int(n_atoms), **options))
    except TypeError as exc:
        raise _bad_options(method, exc) from exc


def code_outputs(method: str, n_atoms: int, **options: Any) -> int:
    """How many code outputs (columns of ``.dense()``) ``method`` gives for ``k`` atoms.

    ``2k`` for split-sign thresholding (each atom's positive and negative parts are
    separate outputs), ``k`` for every other coder. Pooling sizes its features with it.

    Parameters
    ----------
    method : str
    n_atoms : int
    **options

    Returns
    -------
    int
    """
    code_width(method, n_atoms, **options)  # validates the method and options
    return 2 * int(n_atoms) if method == "threshold" and options.get("split_sign") else int(n_atoms)
