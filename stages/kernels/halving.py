"""Successive halving: the schedule of a budgeted search over configurations, and its cut.

Successive halving (Jamieson & Talwalkar, "Non-stochastic best arm identification and
hyperparameter optimization", AISTATS 2016, Algorithm 1) spends a budget ``B`` over
``⌈log_η n⌉`` rungs. At rung ``k`` the ``|S_k|`` surviving configurations each get
``r_k = ⌊B / (|S_k| ⌈log_η n⌉)⌋`` units (here: rows to train and score on), so every rung
costs about ``B / ⌈log_η n⌉``; the best ``⌈|S_k| / η⌉`` survive (the paper halves, η = 2;
a general integer η is the form used by later work on the method). After the last rung one
configuration is left.

Here ``B`` is not given but follows from the rows available: it is the largest budget
whose last rung trains on all ``max_rows`` rows. When that leaves the first rung with fewer
than ``min_rows`` rows per trial, the schedule has fewer rungs and its last rung keeps one
configuration out of several.

Example::

    >>> from atomline.stages.kernels.halving import schedule
    >>> [(r.candidates, r.rows, r.keep) for r in schedule(27, max_rows=900, min_rows=50, eta=3)]
    [(27, 100, 9), (9, 300, 3), (3, 900, 1)]
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError, problem

__all__ = ["Rung", "schedule", "survivors"]


@dataclass(frozen=True)
class Rung:
    """One round of a successive-halving search.

    Attributes
    ----------
    candidates : int
        Configurations tried at this rung.
    rows : int
        Rows each of them is trained and scored on.
    keep : int
        Configurations that go on to the next rung (1 at the last rung).
    """

    candidates: int
    rows: int
    keep: int

    @property
    def budget(self) -> int:
        """Rows spent at this rung, ``candidates × rows``."""
        return self.candidates * self.rows


def schedule(n_candidates: int, *, max_rows: int, min_rows: int, eta: int = 2) -> list[Rung]:
    """The rungs of a successive-halving search.

    Parameters
    ----------
    n_candidates : int
        ``n``, configurations to choose among (≥ 1).
    max_rows : int
        Rows available; the last rung trains on all of them.
    min_rows : int
        Fewest rows a trial may use (≥ 1, ≤ ``max_rows``).
    eta : int
        Reduction factor η ≥ 2: ``⌈|S_k| / η⌉`` configurations survive a rung.

    Returns
    -------
    list of Rung
        In order; ``rows`` grows and ``candidates`` shrinks from rung to rung, and every
        rung's budget is within one trial of ``max_rows × (candidates at the last rung)``.
    """
    _check_count("n_candidates", n_candidates, 1)
    _check_count("min_rows", min_rows, 1)
    _check_count("eta", eta, 2)
    if max_rows < min_rows:
        raise InputError(problem("max_rows", f"at least min_rows = {min_rows}", str(max_rows),
                                 "Use more rows, or a smaller minimum per trial."))
    # ⌈⌈n/η⌉/η⌉ = ⌈n/η²⌉ for integer η, so the sizes are ⌈n/η^k⌉; integer loop, not log().
    sizes = [n_candidates]
    while sizes[-1] > 1:
        sizes.append(-(-sizes[-1] // eta))
    rungs = max(1, len(sizes) - 1)  # ⌈log_η n⌉ rungs (one when there is nothing to cut)
    while True:
        tried = sizes[:rungs]
        last = tried[-1]
        # B = max_rows · |S_last| · rungs, so r_k = ⌊B / (|S_k| · rungs)⌋ = ⌊max_rows·|S_last| / |S_k|⌋.
        rows = [max_rows * last // size for size in tried]
        if rows[0] >= min_rows or rungs == 1:
            break
        rungs -= 1
    keep = [-(-size // eta) for size in tried[:-1]] + [1]
    return [Rung(c, r, k) for c, r, k in zip(tried, rows, keep)]


def survivors(scores: np.ndarray, costs: np.ndarray, k: int) -> np.ndarray:
    """The ``k`` best configurations of a rung, best first.

    Ties in score go to the cheaper configuration, then to the earlier one, so the cut
    depends on the scores, costs and order only.

    Parameters
    ----------
    scores : ndarray of shape (n,), float
        Higher is better; no NaN.
    costs : ndarray of shape (n,), float
        What each configuration cost (seconds, rows × atoms, ...).
    k : int
        How many to keep, ``1 ≤ k ≤ n``.

    Returns
    -------
    ndarray of shape (k,), int64
        Positions in ``scores``, best first.
    """
    scores = np.asarray(scores, dtype=np.float64)
    costs = np.asarray(costs, dtype=np.float64)
    if scores.ndim != 1 or costs.shape != scores.shape or scores.size == 0:
        raise InputError(problem("scores, costs", "two non-empty 1-D arrays of one length",
                                 f"shapes {scores.shape} and {costs.shape}",
                                 "Pass one score and one cost per configuration."))
    if not (np.isfinite(scores).all() and np.isfinite(costs).all()):
        raise InputError(problem("scores, costs", "finite values", "NaN or infinity",
                                 "Score a failed trial as the worst possible value instead."))
    if not 1 <= k <= scores.size:
        raise InputError(problem("k", f"1..{scores.size}", str(k), "Keep at least one, at most all."))
    # lexsort sorts by the last key first: score (descending), then cost, then position.
    order = np.lexsort((np.arange(scores.size), costs, -scores))
    return order[:k].astype(np.int64)


def _check_count(name: str, value: int, lowest: int) -> None:
    if not isinstance(value, (int, np.integer)) or isinstance(value, bool) or value < lowest:
        raise InputError(problem(name, f"an integer ≥ {lowest}", repr(value),
                                 f"Use {name} {lowest} or more."))
