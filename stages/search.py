"""The search stage: which configuration of the chain helps on these records, measured cheaply.

Protocol
--------
1. **Rows.** The labelled records, or a stratified seeded sample of ``max_rows`` of them
   (:func:`~.kernels.classify.labelled_rows`).
2. **Configurations.** The shape defaults of those rows
   (:func:`~.kernels.shape_rules.default_settings`, counted on a fold's training part) and
   changes on the searched axes around them, ``budget`` at most
   (:func:`~.kernels.search.candidates`).
3. **Schedule.** Successive halving (:func:`~.kernels.halving.schedule`): every
   configuration is first scored on a small stratified subsample, the best ``1/eta``
   (:func:`~.kernels.halving.survivors`, ties to the cheaper) go on with ``eta`` times the
   rows, until one is left on all rows. A rung's rows hold the earlier rungs' rows.
4. **Trials.** Each is :func:`~.kernels.search.score_trial` on its rung's rows and folds —
   in memory, nothing written to Zarr — beside the raw-records classifier on the same rows
   and folds, its reference. ``run`` maps the trials of a rung (the flow hands it Prefect
   mapped tasks; the default runs them one by one); every trial is appended to the
   workspace's trial log (:mod:`.workspace.trials`) in configuration order.
5. **Result.** The trials ranked (furthest rung, then score, then cost), one row per
   configuration (its furthest trial); :func:`store_recipe` stores the winner as a recipe.

The ranking is a screening aid for choosing features; it is not a safety or maintenance
decision about the monitored machines.
"""

from __future__ import annotations

import datetime as _dt
import math
import os
from typing import Callable, Sequence

import numpy as np

from .errors import InputError, problem
from .kernels.classify import cross_predict, labelled_rows, stratified_folds
from .kernels.features import take_rows
from .kernels.halving import schedule, survivors
from .kernels.search import candidates, rank, rung_rows, score_trial, trial_cost
from .kernels.shape_rules import default_settings
from .options import SearchOptions
from .report import search_png
from .workspace import Workspace, open_workspace
from .workspace.trials import append_trial, save_recipe

__all__ = ["search_configurations", "score_rows", "store_recipe", "ranked_table", "table_text",
           "store_picture", "Runner", "serial", "SCREENING_NOTE"]

#: ``run(score, jobs)``: the results of ``score(**job)`` for each job, in order.
Runner = Callable[[Callable[..., dict], Sequence[dict]], list[dict]]

#: Shown with every ranked table.
SCREENING_NOTE = ("A screening aid for choosing features, not a safety or maintenance decision "
                  "about the monitored machines.")


def serial(score: Callable[..., dict], jobs: Sequence[dict]) -> list[dict]:
    """Run the trials one after the other in this process."""
    return [score(**job) for job in jobs]


def search_configurations(workspace: Workspace | str, records: str, labels: str,
                          options: SearchOptions = SearchOptions(), *,
                          run: Runner = serial, vectors: bool = False) -> dict:
    """Search configurations of the chain on labelled records by successive halving.

    Parameters
    ----------
    workspace : Workspace or str
    records, labels : str
        Names of the records and their labels in the workspace.
    options : SearchOptions
    run : callable
        Maps one rung's trials (see :data:`Runner`); :func:`serial` by default.
    vectors : bool
        The rank-1 records are feature vectors.

    Returns
    -------
    dict
        ``search_id``, ``schedule`` (candidates, rows, keep per rung), ``ranked`` (one row
        per configuration, best first: :func:`ranked_table`), ``winner`` (its
        configuration), ``trials`` (every trial, in log order) and ``seconds``.
    """
    ws = open_workspace(workspace)
    arr = ws.records(records)
    labels_all = ws.labels(labels)
    if labels_all.shape[0] != arr.shape[0]:
        raise InputError(problem(f"labels/{labels}", f"{arr.shape[0]} labels (one per record)",
                                 f"{labels_all.shape[0]}", "Store one label per record."))
    rows = labelled_rows(labels_all, options.max_rows, options.seed, options.folds)
    chunk = int(arr.chunks[0])
    X = take_rows(rows, chunk, lambda c: np.asarray(arr[c * chunk:(c + 1) * chunk]))
    _, y = np.unique(labels_all[rows], return_inverse=True)
    shape = tuple(int(s) for s in arr.shape[1:])
    n_fit = rows.size * (options.folds - 1) // options.folds
    base = default_settings(shape, n_fit, vectors=vectors)
    configs = candidates(base, shape, n_fit, axes=options.axes, budget=options.budget,
                         seed=options.seed, vectors=vectors)
    rungs = schedule(len(configs), max_rows=rows.size, min_rows=min(options.min_rows, rows.size),
                     eta=options.eta)
    subsets = rung_rows(y, [r.rows for r in rungs], options.seed)
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%S%f")
    search_id = f"s{stamp}-{os.urandom(3).hex()}"
    alive = list(range(len(configs)))
    logged: list[dict] = []
    patches = math.prod(base.grid)
    for k, (rung, subset) in enumerate(zip(rungs, subsets)):
        Xk, yk = X[subset], y[subset]
        split = stratified_folds(yk, options.folds, options.seed)
        raw_pred, _ = cross_predict(Xk.reshape(Xk.shape[0], -1).astype(np.float64), yk, split,
                                    seed=options.seed)
        jobs = [{"workspace": ws.url, "records": records, "rows": rows[subset], "y": yk,
                 "config": configs[i], "folds": options.folds, "seed": options.seed,
                 "raw_pred": raw_pred} for i in alive]
        results = run(score_rows, jobs)
        for i, result in zip(alive, results):
            trial = dict(result, search_id=search_id, rung=k, position=i,
                         label=configs[i]["label"],
                         configuration={c: v for c, v in configs[i].items() if c != "label"},
                         cost=trial_cost(configs[i], yk.size, patches), records=records,
                         labels=labels)
            trial["trial_id"] = append_trial(ws, trial)
            logged.append(trial)
        scores = np.array([r["score"] for r in results])
        costs = np.array([trial_cost(configs[i], yk.size, patches) for i in alive])
        alive = [alive[j] for j in survivors(scores, costs, rung.keep).tolist()]
    ranked = ranked_table(logged)
    return {"search_id": search_id,
            "schedule": [{"candidates": r.candidates, "rows": r.rows, "keep": r.keep} for r in rungs],
            "ranked": ranked, "winner": ranked[0]["configuration"], "trials": logged,
            "seconds": float(sum(t["seconds"] for t in logged)), "note": SCREENING_NOTE}


def score_rows(workspace: Workspace | str, records: str, rows: np.ndarray, y: np.ndarray,
               config: dict, *, folds: int, seed: int, raw_pred: np.ndarray) -> dict:
    """One trial: read the rows from the workspace and score the configuration on them.

    What the mapped tasks run: only the workspace URL, names, row numbers and labels travel
    to a worker, never the records (:func:`~.kernels.search.score_trial` does the work).

    Parameters
    ----------
    workspace : Workspace or str
    records : str
    rows : ndarray of shape (m,), int
        Sorted row numbers of ``data/<records>``.
    y : ndarray of shape (m,), int
        Their class numbers.
    config : dict
    folds, seed, raw_pred
        As :func:`~.kernels.search.score_trial`.

    Returns
    -------
    dict
        The trial's scores (:func:`~.kernels.search.score_trial`).
    """
    ws = open_workspace(workspace)
    arr = ws.records(records)
    chunk = int(arr.chunks[0])
    X = take_rows(np.asarray(rows), chunk, lambda c: np.asarray(arr[c * chunk:(c + 1) * chunk]))
    return score_trial(config, X, np.asarray(y), folds=folds, seed=seed,
                       raw_pred=np.asarray(raw_pred))


def ranked_table(trials: list[dict]) -> list[dict]:
    """One row per configuration (its furthest trial), best first (:func:`~.kernels.search.rank`).

    Parameters
    ----------
    trials : list of dict
        Trials of one search, as logged.

    Returns
    -------
    list of dict
        ``rank``, ``label``, ``rung``, ``rows``, ``score``, ``raw``, ``low``, ``high``,
        ``cost``, ``seconds``, ``configuration``, ``trial_id``.
    """
    furthest: dict[int, dict] = {}
    for t in trials:
        if t["position"] not in furthest or t["rung"] > furthest[t["position"]]["rung"]:
            furthest[t["position"]] = t
    keys = ("label", "rung", "rows", "score", "raw", "low", "high", "cost", "seconds",
            "configuration", "trial_id", "position")
    return [dict({k: t.get(k) for k in keys}, rank=n + 1)
            for n, t in enumerate(rank(list(furthest.values())))]


def table_text(ranked: list[dict]) -> str:
    """The ranked table as aligned text, with the screening note."""
    head = f"{'#':>3}  {'configuration':<36} {'rung':>4} {'rows':>5} {'accuracy':>8} " \
           f"{'raw':>6} {'vs raw (95%)':>17} {'seconds':>8}"
    lines = [head]
    for r in ranked:
        lines.append(f"{r['rank']:>3}  {r['label'][:36]:<36} {r['rung']:>4} {r['rows']:>5} "
                     f"{r['score']:>8.3f} {r['raw']:>6.3f} "
                     f"{'[' + format(r['low'], '+.3f') + ', ' + format(r['high'], '+.3f') + ']':>17} "
                     f"{r['seconds']:>8.1f}")
    return "\n".join(lines + [SCREENING_NOTE])


def store_picture(workspace: Workspace | str, result: dict) -> str:
    """Render accuracy against cost of a search's trials (:func:`~.report.search_png`) and
    store it with the other pictures, under ``reports/<search-id>/search``.

    Returns
    -------
    str
        The picture's path in the workspace.
    """
    ws = open_workspace(workspace)
    png = search_png(result["trials"])
    return ws.save_picture(result["search_id"], "search", png,
                           {"title": "search: accuracy against cost", "note": SCREENING_NOTE})


def store_recipe(workspace: Workspace | str, result: dict, name: str) -> str:
    """Store a search's winner as the recipe ``name``, with where it came from.

    Parameters
    ----------
    workspace : Workspace or str
    result : dict
        What :func:`search_configurations` returned.
    name : str

    Returns
    -------
    str
        The recipe entry id.
    """
    ws = open_workspace(workspace)
    best = result["ranked"][0]
    first = result["trials"][0]
    return save_recipe(ws, name, best["configuration"], {
        "search_id": result["search_id"], "trial_id": best["trial_id"], "label": best["label"],
        "records": first["records"], "labels": first["labels"], "score": best["score"],
        "raw": best["raw"], "low": best["low"], "high": best["high"], "rows": best["rows"]})
