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

Every coder is one :class:`Coder` record in :data:`METHODS`: its function, a help line
per option and the values of the options it requires that learners and the train stage
fill in when not given (:func:`default_options`); :func:`option_table` lists, per coder,
``(name, default, type, help)`` of each option (the options' names, defaults and types
are the function's keyword-only parameters).

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
and without the GIL so that worker threads of one process code their batches at once. The Gram
matrix of a dictionary is computed once and reused by every later :func:`code` call with
the same atoms (``_common.cached_gram``), so callers need not pass ``gram``. The one product
with the dictionary goes through :func:`._common.correlations`, which calls BLAS with a
fixed block shape so that a row's result never depends on the other rows of its chunk.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

import numpy as np

from ...errors import InputError, problem
from ._numba_cache import use_user_cache_dir

# Before any kernel is decorated: the decorator picks the cache location.
use_user_cache_dir()

from .._records import Option, keyword_options, option_list, refuse_unknown_options  # noqa: E402
from ._common import SparseCodes, cached_gram, check_problem, gram  # noqa: E402
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
    "default_options",
    "option_table",
    "Coder",
    "Option",
    "METHODS",
    "SparseCodes",
    "gram",
    "LearnedEncoder",
    "fit_learned_encoder",
    "lambda_for_sparsity",
]


@dataclass(frozen=True)
class Coder:
    """One coder: its function, its options and what a caller that names none gets.

    Attributes
    ----------
    name : str
        Trade name (the key of :data:`METHODS`).
    run : callable
        ``run(X, atoms, **options) -> SparseCodes`` on validated arrays.
    width : callable
        ``width(n_atoms, **options) -> int``: slots per row (see :func:`code_width`).
    help : str
        One line saying what the coder does.
    option_help : mapping of str to str
        One line per option (every keyword-only parameter of ``run``).
    defaults : mapping
        Values for the options ``run`` requires (such as ``n_nonzero``), filled in where
        a learner or the train stage is not given them; ``code`` itself takes options
        as given.
    in_learner : bool
        Whether a learner may code its batches with it (not when it needs state
        trained for fixed atoms, as ``learned`` does).
    """

    name: str
    run: Callable[..., SparseCodes]
    width: Callable[..., int]
    help: str
    option_help: Mapping[str, str]
    defaults: Mapping[str, Any] = field(default_factory=dict)
    in_learner: bool = True

    def __post_init__(self) -> None:
        option_list(self.run, self.option_help, self.defaults)  # refuses a record out of step

    @property
    def options(self) -> tuple[Option, ...]:
        """``(name, default, type, help)`` of every option, sorted by name."""
        return option_list(self.run, self.option_help, self.defaults)

    @property
    def uses_gram(self) -> bool:
        """Whether ``run`` accepts a precomputed Gram matrix (option ``gram``)."""
        return "gram" in self.option_help


_GRAM = "Precomputed Gram matrix of the atoms (k, k); computed from the atoms if not given."
_N_NONZERO = "Distinct atoms per row at most (the sparsity)."
_TOL = "Stop a row once its residual energy is at most tol times its energy."
_LAM = "Weight of the l1 penalty in ½‖x − Wᵀz‖² + lam·‖z‖₁."
_POSITIVE = "Keep every coefficient nonnegative."
_MAX_NONZERO = "Keep at most this many nonzeros per row (largest magnitudes); default k."
_GREEDY = {"n_nonzero": 5}  # a handful of atoms per row: the regime the greedy coders suit
# Rows are at unit contrast after the default preprocessing (mean square about 1); a
# tenth of that keeps a few atoms per row. lambda_for_sparsity picks lam for a target.
_LASSO = {"lam": 0.1}
_PROXIMAL = {"lam": _LAM, "positive": _POSITIVE,
             "init": "Warm-start codes (SparseCodes or dense (n_rows, k)).",
             "max_iter": "Iterations per row at most.",
             "gap_tol": "Stop a row once its relative duality gap is at most this.",
             "max_nonzero": _MAX_NONZERO, "gram": _GRAM}

#: Coders by their trade name.
METHODS: dict[str, Coder] = {c.name: c for c in (
    Coder("mp", mp, mp_width, "Matching pursuit.",
          {"n_nonzero": _N_NONZERO, "tol": _TOL,
           "max_steps": "Pursuit steps at most (an atom may be picked again).", "gram": _GRAM},
          _GREEDY),
    Coder("omp", omp, omp_width, "Orthogonal matching pursuit.",
          {"n_nonzero": _N_NONZERO, "tol": _TOL, "gram": _GRAM}, _GREEDY),
    Coder("ormp", ormp, ormp_width, "Order-recursive matching pursuit.",
          {"n_nonzero": _N_NONZERO, "tol": _TOL, "gram": _GRAM}, _GREEDY),
    Coder("cosamp", cosamp, cosamp_width, "Compressive sampling matching pursuit.",
          {"n_nonzero": _N_NONZERO, "tol": _TOL, "max_iter": "Iterations per row at most.",
           "gram": _GRAM}, _GREEDY),
    Coder("lars", lars, lasso_width, "Exact lasso by the LARS homotopy.",
          {"lam": _LAM, "positive": _POSITIVE, "max_nonzero": _MAX_NONZERO, "gram": _GRAM},
          _LASSO),
    Coder("ista", ista, lasso_width, "Proximal gradient for the lasso.", _PROXIMAL, _LASSO),
    Coder("fista", fista, lasso_width,
          "Proximal gradient for the lasso with momentum and adaptive restart.",
          _PROXIMAL, _LASSO),
    Coder("threshold", threshold, threshold_width, "Soft threshold of the correlations W x.",
          {"alpha": "Offset subtracted from the correlations' magnitudes.",
           "split_sign": "Output the positive and negative parts as separate atoms (2k)."}),
    Coder("triangle", triangle, triangle_width, "The k-means triangle activation.", {}),
    Coder("hard", hard, hard_width, "Hard assignment to the nearest atom.", {}),
    Coder("block-omp", block_omp, block_omp_width,
          "Block OMP over consecutive groups of atoms.",
          {"group_size": "Atoms per group (a divisor of k).",
           "n_groups": "Active groups per row at most.", "tol": _TOL, "gram": _GRAM},
          {"group_size": 2, "n_groups": 2}),
    Coder("learned", learned, learned_width,
          "Unrolled trained ISTA; its encoder is trained for one dictionary.",
          {"encoder": "A LearnedEncoder from fit_learned_encoder for these atoms.",
           "max_nonzero": _MAX_NONZERO}, in_learner=False),
)}


def option_table() -> dict[str, list[Option]]:
    """Every coder's options: ``{coder: [(name, default, type, help), ...]}``.

    ``default`` is the signature's default or, for an option the coder requires, the
    record's :attr:`Coder.defaults` value
    (:data:`~atomline.stages.kernels._records.REQUIRED` when it must always be given).
    """
    return {name: list(c.options) for name, c in sorted(METHODS.items())}


def default_options(method: str) -> dict:
    """The record's :attr:`Coder.defaults` of ``method`` (a new dict)."""
    if method not in METHODS:
        raise _unknown(method)
    return dict(METHODS[method].defaults)


def _unknown(method: str) -> InputError:
    return InputError(problem("coding method", f"one of {sorted(METHODS)}",
                              repr(method), "Pick a listed method."))


def _bad_options(method: str, exc: TypeError) -> InputError:
    return InputError(problem(f"options of coder {method!r}", "the method's own options",
                              str(exc), "See atomline.stages.kernels.coding's docstring."))


def _check_option_names(method: str, options: dict) -> None:
    """Refuse option names the coder does not take, listing those it does (every coder's
    options are keyword-only parameters, so its signature is the list)."""
    refuse_unknown_options(f"coder {method!r}", options, keyword_options(METHODS[method].run),
                           "--coder")


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
        The method's own options (see the module docstring). Coders that take ``gram``
        get the dictionary's Gram matrix without being given it, computed once per
        dictionary (by content) and kept for the next calls.

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
    if METHODS[method].uses_gram and options.get("gram") is None:
        options["gram"] = cached_gram(atoms)
    try:
        return METHODS[method].run(X, atoms, **options)
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
    if method not in METHODS:
        raise _unknown(method)
    _check_option_names(method, options)
    try:
        return int(METHODS[method].width(int(n_atoms), **options))
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
