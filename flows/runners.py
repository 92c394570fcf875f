"""Task runners and work planning for atomline flows.

Prefect runs the tasks; this module only picks the runner and cuts the work. Example::

    from atomline.flows import encode_flow
    from atomline.flows.runners import task_runner

    # two worker threads on this machine (the default kind)
    encode_flow.with_options(task_runner=task_runner("threads", workers=2))(
        "archive.zarr", "vibration", workers=2)

    # a Dask cluster (prefect-dask): an existing scheduler, or a local one when no address
    encode_flow.with_options(task_runner=task_runner("dask", workers=8,
                                                     address="tcp://scheduler:8786"))(
        "s3://bucket/archive.zarr", "vibration", workers=8)

The ``workers`` flow parameter and the runner's worker count should agree: the flow uses it
to cut the chunk list into batches (a few per worker) and to limit BLAS threads per task
so that workers × threads never exceed the cores.
"""

from __future__ import annotations

import os

import numpy as np
from prefect.task_runners import ProcessPoolTaskRunner, ThreadPoolTaskRunner

from atomline.stages.errors import InputError, problem

__all__ = ["task_runner", "plan_batches", "blas_threads", "RUNNERS"]

RUNNERS = ("threads", "processes", "dask")


def task_runner(kind: str = "threads", workers: int = 2, address: str | None = None):
    """Make a Prefect task runner.

    Parameters
    ----------
    kind : {"threads", "processes", "dask"}
        ``threads`` (default): :class:`prefect.task_runners.ThreadPoolTaskRunner`;
        ``processes``: :class:`prefect.task_runners.ProcessPoolTaskRunner`;
        ``dask``: :class:`prefect_dask.DaskTaskRunner` (install ``atomline[dask]``).
    workers : int
        Worker count (threads, processes, or local Dask workers).
    address : str, optional
        Dask scheduler address; a local cluster of ``workers`` single-threaded processes
        when omitted.

    Returns
    -------
    prefect.task_runners.TaskRunner
    """
    if workers < 1:
        raise InputError(problem("workers", "a positive integer", str(workers), "Use --workers 1 or more."))
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
        return DaskTaskRunner(cluster_kwargs={"n_workers": workers, "threads_per_worker": 1,
                                              "processes": True, "dashboard_address": ":0"})
    raise InputError(problem("runner", f"one of {RUNNERS}", repr(kind), "Pick a listed runner."))


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
