"""The search flow: successive halving over configurations, each trial a mapped Prefect task.

``search_flow`` runs :func:`atomline.stages.search.search_configurations` with every rung's
trials mapped over the flow's task runner (threads, processes or Dask, from
:class:`~atomline.stages.options.RunnerOptions`); only the workspace URL, names, row numbers
and labels go to a task. It publishes the ranked table as a Prefect table artifact, stores
the picture of accuracy against cost with the workspace's other pictures and, given a
``recipe`` name, stores the winner as that recipe. Example::

    from atomline.flows.search import search_flow
    result = search_flow("archive.zarr", "digits", recipe="digits-best")
    print(result["ranked"][0]["label"], result["ranked"][0]["score"])

The ranking is a screening aid for choosing features, not a safety or maintenance decision.
"""

from __future__ import annotations

from prefect import flow, get_run_logger, task
from prefect.artifacts import create_table_artifact
from prefect.cache_policies import NO_CACHE
from prefect.futures import wait

from atomline.stages.options import SearchOptions
from atomline.stages.search import (SCREENING_NOTE, score_rows, search_configurations,
                                    store_picture, store_recipe)

from .artifacts import artifact_key
from .runners import check_reachable, task_runner

__all__ = ["search_flow", "trial_task", "table_rows"]

#: One trial (:func:`atomline.stages.search.score_rows`) as a Prefect task.
trial_task = task(score_rows, name="search-trial", cache_policy=NO_CACHE)


def _mapped(score, jobs: list[dict]) -> list[dict]:
    """Run one rung's trials as mapped ``trial_task`` runs on the flow's task runner."""
    futures = [trial_task.submit(**job) for job in jobs]
    wait(futures)
    return [f.result() for f in futures]


def table_rows(ranked: list[dict]) -> list[dict]:
    """The ranked table as plain rows (no configurations' nested values) for an artifact."""
    return [{"rank": r["rank"], "configuration": r["label"], "rung": r["rung"], "rows": r["rows"],
             "accuracy": round(r["score"], 4), "raw": round(r["raw"], 4),
             "versus_raw_low": round(r["low"], 4), "versus_raw_high": round(r["high"], 4),
             "seconds": round(r["seconds"], 2)} for r in ranked]


@flow(name="atomline-search", task_runner=task_runner("threads", 2))
def search_flow(workspace: str, records: str, labels: str | None = None,
                search: SearchOptions = SearchOptions(), recipe: str | None = None,
                vectors: bool = False) -> dict:
    """Search configurations of the chain on ``data/<records>`` (see ``stages.search``).

    Parameters
    ----------
    workspace : str
    records : str
    labels : str, optional
        ``labels/<labels>``; the records' name when omitted.
    search : SearchOptions
    recipe : str, optional
        Store the winner as this recipe (``nightly``, ``encode`` and ``pool`` then use it).
    vectors : bool
        The rank-1 records are feature vectors.

    Returns
    -------
    dict
        As :func:`~atomline.stages.search.search_configurations`, plus ``picture`` and, with
        ``recipe``, ``recipe_id``.
    """
    check_reachable(workspace)
    logger = get_run_logger()
    result = search_configurations(workspace, records, labels or records, search, run=_mapped,
                                   vectors=vectors)
    result["picture"] = store_picture(workspace, result)
    create_table_artifact(table_rows(result["ranked"]), key=artifact_key(records, "search"),
                          description=f"search {result['search_id']}: {SCREENING_NOTE}")
    best = result["ranked"][0]
    logger.info("search %s: best %s, accuracy %.4f (raw %.4f) on %d rows", result["search_id"],
                best["label"], best["score"], best["raw"], best["rows"])
    if recipe is not None:
        result["recipe_id"] = store_recipe(workspace, result, recipe)
        logger.info("recipe %r stored (%s)", recipe, result["recipe_id"])
    return result

