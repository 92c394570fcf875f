"""Task runners and work planning for atomline flows.

Prefect runs the tasks; this module only picks the runner and cuts the work. Example::

    from atomline.flows import encode_flow
    from atomline.flows.runners import task_runner
    from atomline.stages.options import RunnerOptions

    # two worker threads on this machine (the default kind)
    encode_flow.with_options(task_runner=task_runner("threads", workers=2))(
        "archive.zarr", "vibration", runner=RunnerOptions(workers=2))

    # a Dask cluster (prefect-dask): an existing scheduler, or a local one when no address
    encode_flow.with_options(task_runner=task_runner("dask", workers=8,
                                                     address="tcp://scheduler:8786"))(
        "s3://bucket/archive.zarr", "vibration", runner=RunnerOptions("dask", workers=8))

The flow's ``runner.workers`` and the runner's worker count should agree: the flow uses it
to cut the chunk list into batches (a few per worker) and to limit BLAS threads per task
so that workers × threads never exceed the cores.
"""

from __future__ import annotations

import os

import numpy as np
from prefect.task_runners import ProcessPoolTaskRunner, ThreadPoolTaskRunner

from atomline.stages.checks import check_workers
from atomline.stages.errors import InputError, problem
from atomline.stages.options import RUNNERS, RunnerOptions

__all__ = ["task_runner", "runner_for", "plan_batches", "blas_threads", "check_reachable", "RUNNERS"]


def task_runner(kind: str = "threads", workers: int = 2, address: str | None = None,
                dask_options: dict | None = None):
    """Make a Prefect task runner.

    Parameters
    ----------
    kind : {"threads", "processes", "dask"}
        ``threads`` (default): :class:`prefect.task_runners.ThreadPoolTaskRunner`;
        ``processes``: :class:`prefect.task_runners.ProcessPoolTaskRunner`;
        ``dask``: :class:`prefect_dask.DaskTaskRunner` (install ``atomline[dask]``).
        Process and Dask workers open the workspace by its URL, so it must be a place
        they can reach (a directory or object storage, not ``memory://``).
    workers : int
        Worker count (threads, processes, or local Dask workers).
    address : str, optional
        Dask scheduler address; a local cluster of ``workers`` single-threaded processes
        when omitted.
    dask_options : dict, optional
        Extra keyword arguments of the local Dask cluster (e.g. ``local_directory``).

    Returns
    -------
    prefect.task_runners.TaskRunner
    """
    check_workers(workers)
    if kind == "threads":
        return ThreadPoolTaskRunner(max_workers=workers)
    if kind == "processes":
        return ProcessPoolTaskRunner(max_workers=workers)
    if kind == "dask":
        try:
            from prefect_dask import DaskTaskRunner
        except ImportError as exc:
            raise InputError(problem("runner 'dask'", "prefect-dask installed", "it is missing",
                                     "pip install 'atomline[dask]'.")) from exc
        if address:
            return DaskTaskRunner(address=address)
        cluster = {"n_workers": workers, "threads_per_worker": 1, "processes": True,
                   "dashboard_address": ":0"}
        return DaskTaskRunner(cluster_kwargs=dict(cluster, **(dask_options or {})))
    raise InputError(problem("runner", f"one of {RUNNERS}", repr(kind), "Pick a listed runner."))


def runner_for(options: RunnerOptions):
    """The Prefect task runner a :class:`~atomline.stages.options.RunnerOptions` describes
    (the one door from the declared options to :func:`task_runner`)."""
    return task_runner(options.runner, options.workers, options.address, options.dask_options)


def check_reachable(workspace: str) -> None:
    """Refuse an in-memory workspace when tasks run outside this process.

    Call it inside a flow: it reads the flow run's task runner. ``memory://`` stores live
    in one process, so process-pool and Dask workers would each see an empty one.

    Raises
    ------
    InputError
    """
    from prefect.context import FlowRunContext

    ctx = FlowRunContext.get()
    runner = getattr(ctx, "task_runner", None)
    if str(workspace).startswith("memory://") and runner is not None \
            and not isinstance(runner, ThreadPoolTaskRunner):
        raise InputError(problem(
            f"workspace {workspace}", "a directory or object-storage URL for this runner",
            f"an in-memory store, which {type(runner).__name__} workers cannot see",
            "Use --runner threads, or put the workspace in a directory or on s3://."))


def blas_threads(workers: int) -> int:
    """BLAS threads per worker so that workers × threads ≤ the machine's cores."""
    return max(1, (os.cpu_count() or 1) // max(1, workers))


def plan_batches(chunks: list[int], workers: int, per_worker: int = 4) -> list[list[int]]:
    """Cut a list of chunk numbers into contiguous batches, a few per worker.

    A Prefect task run costs milliseconds (threads) to a fifth of a second (processes,
    Dask), so each task gets whole batches of chunks rather than single chunks; a few
    batches per worker keep the load balanced when chunks differ in cost.

    Parameters
    ----------
    chunks : list of int
    workers : int
    per_worker : int

    Returns
    -------
    list of list of int
        Non-empty batches covering ``chunks`` in order.
    """
    if not chunks:
        return []
    n_batches = min(len(chunks), max(1, workers * per_worker))
    return [b.tolist() for b in np.array_split(np.asarray(chunks, dtype=int), n_batches)]
