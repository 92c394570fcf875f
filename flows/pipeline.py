"""Prefect flows that compose the atomline stages.

``train_flow``, ``encode_flow``, ``pool_flow`` and ``evaluate_flow`` run one stage each;
``nightly_flow`` chains them with a promotion gate. All take the workspace as a URL and
arrays by name: no array ever passes through Prefect. Example (Prefect with no server
configured starts a temporary local one)::

    from atomline.flows import nightly_flow
    from atomline.flows.runners import task_runner

    report = nightly_flow.with_options(task_runner=task_runner("threads", 2))(
        "archive.zarr", "vibration", n_atoms=128, patch_size=64, stride=32, workers=2)
    print(report["outcome"], report["candidate"]["features"]["accuracy"])
"""

from __future__ import annotations

import time

from prefect import flow, get_run_logger

from atomline.stages.errors import InputError, NotFound, problem
from atomline.stages.encode import codes_path, encode_task, prepare_encode
from atomline.stages.evaluate import evaluate_task
from atomline.stages.pool import features_path, pool_task, prepare_pool
from atomline.stages.train import train_task
from atomline.stages.workspace import Workspace

from .runners import blas_threads, plan_batches, task_runner

__all__ = ["train_flow", "encode_flow", "pool_flow", "evaluate_flow", "nightly_flow", "OUTCOMES"]

#: What a nightly run can end with.
OUTCOMES = {
    "first": "no dictionary was promoted yet; the candidate is promoted",
    "promoted": "the candidate scored within tolerance of the promoted one, or better; promoted",
    "unchanged": "the candidate is the promoted dictionary (same inputs); nothing to do",
    "regression": "the candidate scored worse than the promoted one beyond tolerance; not promoted",
}


def _summarise(results: list[dict], prepared: dict, key: str, wall: float) -> dict:
    done_now = sum(r[key] for r in results)
    seconds = sum(r["seconds"] for r in results)
    records = sum(r["records"] for r in results)
    return {
        "output": prepared["output"],
        "n_chunks": prepared["n_chunks"],
        key: done_now,
        "skipped": prepared["n_chunks"] - len(prepared["pending"]) + sum(r["skipped"] for r in results),
        "records": records,
        "task_seconds": seconds,
        "seconds": wall,
        "records_per_second": records / wall if wall > 0 else None,
    }


@flow(name="atomline-train", task_runner=task_runner("threads", 1))
def train_flow(workspace: str, records: str, n_atoms: int = 128, patch_size: int | list[int] | None = None,
               stride: int | list[int] | None = None, method: str = "online", coder: str = "omp",
               coder_options: dict | None = None, learner_options: dict | None = None,
               preprocessing: dict | None = None, sample_patches: int = 20_000, seed: int = 0,
               break_lease: bool = False) -> dict:
    """Learn a dictionary from a sample of ``data/<records>`` (see ``train_dictionary``)."""
    manifest = train_task(workspace, records, n_atoms=n_atoms, patch_size=_tuple(patch_size),
                          stride=_tuple(stride), method=method, coder=coder,
                          coder_options=coder_options, learner_options=learner_options,
                          preprocessing=preprocessing, sample_patches=sample_patches, seed=seed,
                          run=_run_name(), break_lease=break_lease)
    get_run_logger().info("dictionary %s (%s, reused=%s)", manifest["dict_id"], method, manifest["reused"])
    return manifest


@flow(name="atomline-encode", task_runner=task_runner("threads", 2))
def encode_flow(workspace: str, records: str, dict_id: str | None = None, coder: str | None = None,
                coder_options: dict | None = None, workers: int = 2, batches_per_worker: int = 4,
                overwrite: bool = False, on_bad_chunk: str = "stop", break_lease: bool = False) -> dict:
    """Encode every pending chunk of ``data/<records>`` in parallel batches.

    ``dict_id`` defaults to the promoted dictionary. Finished chunks are skipped, so
    rerunning after a crash resumes. The run holds the write lease of the codes output
    throughout (a second run on the same output is refused); ``on_bad_chunk`` is
    ``"stop"`` or ``"skip"`` (see ``encode_chunks``).
    """
    logger = get_run_logger()
    dict_id = dict_id or _promoted(workspace)
    ws = Workspace.open(workspace)
    with ws.lease(codes_path(dict_id, records), run=_run_name(), break_existing=break_lease):
        prepared = prepare_encode(ws, records, dict_id, coder=coder,
                                  coder_options=coder_options, overwrite=overwrite)
        batches = plan_batches(prepared["pending"], workers, batches_per_worker)
        logger.info("encode %s with %s: %d of %d chunks pending, %d batches",
                    records, dict_id, len(prepared["pending"]), prepared["n_chunks"], len(batches))
        start = time.perf_counter()
        futures = [encode_task.submit(workspace, records, dict_id, b, blas_threads=blas_threads(workers),
                                      on_bad_chunk=on_bad_chunk)
                   for b in batches]
        results = [f.result() for f in futures]
        skipped = _record_skips(ws, codes_path(dict_id, records), records)
    summary = _summarise(results, prepared, "encoded", time.perf_counter() - start)
    summary["skipped_rows"] = skipped["n_rows"]
    if skipped["n_rows"]:
        logger.warning("skipped %d rows of bad input chunks %s", skipped["n_rows"], skipped["chunks"])
    summary.update(dict_id=dict_id, coder=prepared["coder"], coder_options=prepared["coder_options"])
    logger.info("encoded %d chunks, skipped %d already done", summary["encoded"], summary["skipped"])
    return summary


@flow(name="atomline-pool", task_runner=task_runner("threads", 2))
def pool_flow(workspace: str, records: str, dict_id: str | None = None, reduce: str = "max",
              split_sign: bool = True, regions: int | list[int] = 4, workers: int = 2,
              batches_per_worker: int = 4, overwrite: bool = False, break_lease: bool = False) -> dict:
    """Pool the codes of every pending chunk into per-record features (under a write lease)."""
    dict_id = dict_id or _promoted(workspace)
    ws = Workspace.open(workspace)
    with ws.lease(features_path(dict_id, records), run=_run_name(), break_existing=break_lease):
        prepared = prepare_pool(ws, records, dict_id, reduce=reduce, split_sign=split_sign,
                                regions=_tuple(regions), overwrite=overwrite)
        start = time.perf_counter()
        futures = [pool_task.submit(workspace, records, dict_id, b)
                   for b in plan_batches(prepared["pending"], workers, batches_per_worker)]
        results = [f.result() for f in futures]
        skipped = _record_skips(ws, features_path(dict_id, records), records)
    summary = _summarise(results, prepared, "pooled", time.perf_counter() - start)
    summary["skipped_rows"] = skipped["n_rows"]
    summary.update(dict_id=dict_id, n_features=prepared["n_features"])
    get_run_logger().info("pooled %d chunks, skipped %d", summary["pooled"], summary["skipped"])
    return summary


@flow(name="atomline-evaluate", task_runner=task_runner("threads", 1))
def evaluate_flow(workspace: str, records: str, dict_id: str | None = None, labels: str | None = None,
                  test_fraction: float = 0.25, max_rows: int = 20_000, C: float = 1.0,
                  seed: int = 0, baseline: bool = True, tag: str = "") -> dict:
    """Score a linear classifier on the pooled features and on the raw records."""
    dict_id = dict_id or _promoted(workspace)
    manifest = evaluate_task(workspace, records, dict_id, labels=labels, test_fraction=test_fraction,
                             max_rows=max_rows, C=C, seed=seed, baseline=baseline, tag=tag)
    get_run_logger().info("evaluation %s: features %.3f, raw %s", manifest["run_id"],
                          manifest["features"]["accuracy"],
                          f"{manifest['raw']['accuracy']:.3f}" if "raw" in manifest else "-")
    return manifest


@flow(name="atomline-nightly", task_runner=task_runner("threads", 2))
def nightly_flow(workspace: str, records: str, labels: str | None = None, n_atoms: int = 128,
                 patch_size: int | list[int] | None = None, stride: int | list[int] | None = None,
                 method: str = "online", coder: str = "omp", coder_options: dict | None = None,
                 learner_options: dict | None = None, preprocessing: dict | None = None,
                 sample_patches: int = 20_000, reduce: str = "max", split_sign: bool = True,
                 regions: int | list[int] = 4, metric: str = "accuracy", tolerance: float = 0.01,
                 test_fraction: float = 0.25, max_rows: int = 20_000, seed: int = 0,
                 workers: int = 2, batches_per_worker: int = 4, on_bad_chunk: str = "stop",
                 break_lease: bool = False) -> dict:
    """Train a candidate dictionary, encode, pool, evaluate, and promote it if it holds up.

    The candidate is promoted when no dictionary is promoted yet, or when its score
    (``metric``: ``accuracy`` or ``macro_f1``) is at least the promoted dictionary's minus
    ``tolerance``; both are scored on the same seeded split. The pointer moves only after
    the candidate's features and evaluation are complete.

    Returns
    -------
    dict
        ``outcome`` (a key of :data:`OUTCOMES`), ``candidate`` and ``promoted``
        evaluations, the train/encode/pool manifests, and the promoted id after the run.
    """
    logger = get_run_logger()
    if metric not in ("accuracy", "macro_f1"):
        raise InputError(problem("metric", "'accuracy' or 'macro_f1'", repr(metric),
                                 "Pick one of the two."))
    trained = train_flow.fn(workspace, records, n_atoms=n_atoms, patch_size=patch_size, stride=stride,
                            method=method, coder=coder, coder_options=coder_options,
                            learner_options=learner_options, preprocessing=preprocessing,
                            sample_patches=sample_patches, seed=seed, break_lease=break_lease)
    candidate_id = trained["dict_id"]
    previous = Workspace.open(workspace).promoted

    def features_for(dict_id: str) -> tuple[dict, dict]:
        enc = encode_flow.fn(workspace, records, dict_id=dict_id, workers=workers,
                             batches_per_worker=batches_per_worker, on_bad_chunk=on_bad_chunk,
                             break_lease=break_lease)
        pooled = pool_flow.fn(workspace, records, dict_id=dict_id, reduce=reduce, split_sign=split_sign,
                              regions=regions, workers=workers, batches_per_worker=batches_per_worker,
                              break_lease=break_lease)
        return enc, pooled

    encoded, pooled = features_for(candidate_id)
    evaluation = dict(labels=labels, test_fraction=test_fraction, max_rows=max_rows, seed=seed)
    cand_eval = evaluate_task(workspace, records, candidate_id, tag="candidate", **evaluation)
    report = {"candidate_id": candidate_id, "previous_id": previous, "train": trained,
              "encode": encoded, "pool": pooled, "candidate": cand_eval, "promoted": None,
              "metric": metric, "tolerance": tolerance}
    if previous is None:
        outcome = "first"
    elif previous == candidate_id:
        outcome = "unchanged"
    else:
        features_for(previous)
        prev_eval = evaluate_task(workspace, records, previous, tag="promoted", baseline=False,
                                  **evaluation)
        report["promoted"] = prev_eval
        ok = cand_eval["features"][metric] >= prev_eval["features"][metric] - tolerance
        outcome = "promoted" if ok else "regression"
    if outcome in ("first", "promoted"):
        # promote() re-checks that the dictionary, its features and this evaluation of
        # them are complete and consistent before it moves the pointer.
        Workspace.open(workspace).promote(candidate_id, evaluation=cand_eval["run_id"])
    report["outcome"] = outcome
    report["promoted_id"] = Workspace.open(workspace).promoted
    log = logger.warning if outcome == "regression" else logger.info
    log("nightly outcome: %s — %s", outcome, OUTCOMES[outcome])
    return report


def _run_name() -> str:
    """Name of the current flow run, for write leases (who holds an output)."""
    from prefect.runtime import flow_run

    return f"{flow_run.flow_name or 'atomline'}/{flow_run.name or flow_run.id or 'local'}"


def _record_skips(ws: Workspace, path: str, records: str) -> dict:
    """List the rows of skipped chunks in the output's attributes (one writer: the flow)."""
    info = ws.describe_records(records)
    return ws.output(path).record_skips(info["chunk_rows"], info["shape"][0])


def _promoted(workspace: str) -> str:
    dict_id = Workspace.open(workspace).promoted
    if dict_id is None:
        raise NotFound(problem(f"workspace {workspace}", "a promoted dictionary or --dictionary",
                               "none promoted", "Run the nightly flow, or name a dictionary."))
    return dict_id


def _tuple(value):
    """Prefect parameters arrive as JSON: lists become the tuples the stages expect."""
    return tuple(value) if isinstance(value, list) else value
