"""Choosing the lasso weight ``lam`` from a target number of nonzeros per row.

Users think in nonzeros, not in ``lam``. The mean number of nonzeros of the lasso codes
of a sample falls (almost monotonically) as ``lam`` grows, from ``k``-ish near 0 to
exactly 0 at ``lam = max_rows ‖W x‖∞``; a bisection on ``log lam`` between those ends
finds the value whose mean count is closest to the target.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ...errors import InputError, problem
from ._rows import product
from ._common import check_problem, nonnegative_float, positive_int

__all__ = ["lambda_for_sparsity"]


def lambda_for_sparsity(
    X_sample: np.ndarray,
    atoms: np.ndarray,
    target_nonzero: float,
    method: str = "lars",
    *,
    n_bisections: int = 30,
    **options: Any,
) -> float:
    """Find ``lam`` whose lasso codes have ``target_nonzero`` nonzeros per row on average.

    Parameters
    ----------
    X_sample : ndarray of shape (n_rows, d), float32 or float64
        A sample of the rows that will be coded.
    atoms : ndarray of shape (k, d)
        The dictionary.
    target_nonzero : float
        Wanted mean number of nonzeros per row (``0 < target < min(k, d)``).
    method : {"lars", "fista"}
        The lasso coder the value is meant for (``lars`` is exact and, with its path
        bounded at ``4 · target`` atoms, cheap at every trial value).
    n_bisections : int
        Bisection steps on ``log lam`` (each codes the sample once).
    **options
        Further options of the coder (e.g. ``positive``).

    Returns
    -------
    float
        The trial ``lam`` whose mean count came closest to the target.
    """
    from . import code

    X, W = check_problem(X_sample, atoms)
    target = nonnegative_float("target_nonzero", target_nonzero)
    limit = min(W.shape)
    if not 0 < target < limit:
        raise InputError(problem("target_nonzero", f"a number in (0, {limit})", repr(target),
                                 "Ask for fewer nonzeros than min(k, d)."))
    if method not in ("lars", "fista"):
        raise InputError(problem("method", "'lars' or 'fista'", repr(method),
                                 "Pick a lasso coder."))
    n_bisections = positive_int("n_bisections", n_bisections)
    if method == "lars":
        # Rows whose path reaches this many atoms are past the target anyway.
        options.setdefault("max_nonzero", int(min(W.shape[0], max(4 * target, target + 8))))
    C = product(X, W.T)
    hi = float(np.max(C if options.get("positive") else np.abs(C)))
    if hi <= 0:
        raise InputError(problem("sample rows", "rows correlated with some atom",
                                 "all correlations zero", "Pass a sample of real rows."))
    lo = hi * 1e-6
    best_lam, best_miss = hi, target
    for _ in range(n_bisections):
        mid = float(np.sqrt(lo * hi))
        mean = float(code(X, W, method, lam=mid, **options).count.mean())
        miss = abs(mean - target)
        if miss < best_miss:
            best_lam, best_miss = mid, miss
        if mean > target:
            lo = mid
        else:
            hi = mid
    return best_lam
