"""Prefect flows that compose the atomline stages.

``train_flow``, ``encode_flow``, ``pool_flow`` and ``evaluate_flow`` run one stage each;
``nightly_flow`` chains them with a promotion gate. All take the workspace as a URL and
arrays by name: no array ever passes through Prefect. Their options are the stages' option
objects (``stages/options.py``), one parameter per group (``train``, ``encode``, ``pool``,
``evaluate``, ``report``, ``gate``, ``drift``, ``runner``); Prefect validates them and shows
their fields. ``runner`` gives the flows its ``workers`` and ``batches_per_worker`` (how the
chunks are cut into tasks); the task runner itself is the flow's (``with_options``,
``runners.runner_for``). Example (Prefect with no server
configured starts a temporary local one)::

    from atomline.flows import nightly_flow
    from atomline.flows.runners import task_runner
    from atomline.stages.options import RunnerOptions, TrainOptions

    report = nightly_flow.with_options(task_runner=task_runner("threads", 2))(
        "archive.zarr", "vibration", train=TrainOptions(n_atoms=128, patch_size=64, stride=32),
        runner=RunnerOptions(workers=2))
    print(report["outcome"], report["candidate"]["features"]["accuracy"])
"""

from __future__ import annotations

import dataclasses
import time
from typing import Any

from prefect import flow, get_run_logger, task
from prefect.artifacts import create_markdown_artifact
from prefect.cache_policies import NO_CACHE
from prefect.events import emit_event
from prefect.futures import as_completed
from prefect.states import Completed, Failed, State

from atomline.stages.checks import check_retrain, check_test_records, promoted_or_named
from atomline.stages.drift import detect_drift
from atomline.stages.encode import codes_path, encode_task, prepare_encode
from atomline.stages.evaluate import coding_of, evaluate_task
from atomline.stages.gate import (OUTCOMES, STATE_NAMES, against_references, compare,
                                  describe_references, nightly_run_key, outcome_without_comparison,
                                  record_decision, recorded_decision, required_baselines,
                                  with_references)
from atomline.stages.report import render_report
from atomline.stages.options import (BASELINES, RETRAIN, DriftOptions, EncodeOptions, EvaluateOptions,
                                     GateOptions, PoolOptions, ReportOptions, RunnerOptions,
                                     TrainOptions, deciding)
from atomline.stages.pool import features_path, pool_task, prepare_pool
from atomline.stages.train import train_task
from atomline.stages.workspace import Workspace, open_workspace

from .artifacts import SCREENING, ChunkProgress, artifact_key, publish_evaluation, settings_lines
from .runners import blas_threads, check_reachable, plan_batches, task_runner

#: Rendering the pictures of an evaluation as a Prefect task.
render_task = task(render_report, name="render-pictures", cache_policy=NO_CACHE)

__all__ = ["train_flow", "encode_flow", "pool_flow", "evaluate_flow", "nightly_flow",
           "test_set_features", "OUTCOMES",
           "STATE_NAMES", "RETRAIN"]

#: The flows' default runner options: the two workers of their decorators' task runners.
FLOW_RUNNER = RunnerOptions(workers=2)


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
def train_flow(workspace: str, records: str, train: TrainOptions = TrainOptions(),
               break_lease: bool = False) -> dict:
    """Learn a dictionary from a sample of ``data/<records>`` (see ``train_dictionary``)."""
    manifest = train_task(workspace, records, train, run=_run_name(), break_lease=break_lease)
    get_run_logger().info("dictionary %s (%s, reused=%s)", manifest["dict_id"], train.method,
                          manifest["reused"])
    return manifest


@flow(name="atomline-encode", task_runner=task_runner("threads", 2))
def encode_flow(workspace: str, records: str, dict_id: str | None = None,
                encode: EncodeOptions = EncodeOptions(), runner: RunnerOptions = FLOW_RUNNER,
                overwrite: bool = False, break_lease: bool = False) -> dict:
    """Encode every pending chunk of ``data/<records>`` in parallel batches.

    ``dict_id`` defaults to the promoted dictionary. Finished chunks are skipped, so
    rerunning after a crash resumes. The run holds the write lease of the codes output
    throughout (a second run on the same output is refused); ``encode.on_bad_chunk`` is
    ``"stop"`` or ``"skip"`` (see ``encode_chunks``).
    """
    logger = get_run_logger()
    check_reachable(workspace)
    dict_id = dict_id or _promoted(workspace)
    ws = open_workspace(workspace)
    with ws.lease(codes_path(dict_id, records), run=_run_name(), break_existing=break_lease) as held:
        prepared = prepare_encode(ws, records, dict_id, encode, overwrite=overwrite)
        batches = plan_batches(prepared["pending"], runner.workers, runner.batches_per_worker)
        logger.info("encode %s with %s: %d of %d chunks pending, %d batches",
                    records, dict_id, len(prepared["pending"]), prepared["n_chunks"], len(batches))
        start = time.perf_counter()
        progress = ChunkProgress(records, len(prepared["pending"]), "encode")
        futures = [encode_task.submit(workspace, records, dict_id, b, encode,
                                      blas_threads=blas_threads(runner.workers), lease=held.info.token)
                   for b in batches]
        results = []
        for future in as_completed(futures):
            results.append(future.result())
            progress.advance(results[-1]["encoded"] + results[-1]["skipped"])
        skipped = _record_skips(ws, codes_path(dict_id, records), records)
    summary = _summarise(results, prepared, "encoded", time.perf_counter() - start)
    summary["skipped_rows"] = skipped["n_rows"]
    if skipped["n_rows"]:
        logger.warning("skipped %d rows of bad input chunks %s", skipped["n_rows"], skipped["chunks"])
    summary.update(dict_id=dict_id, coder=prepared["coder"], coder_options=prepared["coder_options"])
    logger.info("encoded %d chunks, skipped %d already done", summary["encoded"], summary["skipped"])
    return summary


@flow(name="atomline-pool", task_runner=task_runner("threads", 2))
def pool_flow(workspace: str, records: str, dict_id: str | None = None,
              pool: PoolOptions = PoolOptions(), runner: RunnerOptions = FLOW_RUNNER,
              overwrite: bool = False, break_lease: bool = False) -> dict:
    """Pool the codes of every pending chunk into per-record features (under a write lease);
    ``pool.on_bad_chunk`` as for ``encode_flow``, for codes chunks that cannot be decoded."""
    check_reachable(workspace)
    dict_id = dict_id or _promoted(workspace)
    ws = open_workspace(workspace)
    with ws.lease(features_path(dict_id, records), run=_run_name(), break_existing=break_lease) as held:
        prepared = prepare_pool(ws, records, dict_id, pool, overwrite=overwrite)
        start = time.perf_counter()
        futures = [pool_task.submit(workspace, records, dict_id, b, pool, lease=held.info.token)
                   for b in plan_batches(prepared["pending"], runner.workers,
                                         runner.batches_per_worker)]
        results = [f.result() for f in futures]
        skipped = _record_skips(ws, features_path(dict_id, records), records)
    summary = _summarise(results, prepared, "pooled", time.perf_counter() - start)
    summary["skipped_rows"] = skipped["n_rows"]
    summary.update(dict_id=dict_id, n_features=prepared["n_features"], regions=prepared["regions"],
                   regions_reason=prepared["regions_reason"])
    get_run_logger().info("pooled %d chunks, skipped %d", summary["pooled"], summary["skipped"])
    return summary


@flow(name="atomline-evaluate", task_runner=task_runner("threads", 1))
def evaluate_flow(workspace: str, records: str, dict_id: str | None = None, labels: str | None = None,
                  evaluate: EvaluateOptions = EvaluateOptions(), report: ReportOptions = ReportOptions(),
                  tag: str = "", runner: RunnerOptions = FLOW_RUNNER) -> dict:
    """Score a linear classifier on the pooled features and on the baselines.

    With ``evaluate.split="test-set"`` the test records are first encoded and pooled with
    the same dictionary, coder options and pooling as the records' features (pending
    chunks only, in ``runner``'s batches; see :func:`test_set_features`).

    ``evaluate.baselines`` and ``evaluate.learning_curve`` default to the evaluate stage's
    (``BASELINES``, ``DEFAULT_CURVE``); pass ``()`` for none. Creates the markdown and
    table artifacts and, with ``report.pictures``, stores the pictures in the workspace.
    ``evaluate.on_bad_chunk="skip"`` leaves out the rows of features chunks that do not decode.
    """
    dict_id = dict_id or _promoted(workspace)
    test_set_features(workspace, records, dict_id, evaluate, runner)
    manifest = evaluate_task(workspace, records, dict_id, evaluate, labels=labels, tag=tag)
    paths = render_task(workspace, manifest["run_id"], report.class_names) if report.pictures else []
    manifest["pictures"] = paths
    publish_evaluation(open_workspace(workspace), manifest, records,
                       title=f"atomline evaluation of {records}", picture_paths=paths)
    _log_scores(get_run_logger(), manifest)
    return manifest


def test_set_features(workspace: str, records: str, dict_id: str, evaluate: EvaluateOptions,
                      runner: RunnerOptions = FLOW_RUNNER, break_lease: bool = False) -> dict | None:
    """Encode and pool ``evaluate.test_records`` as ``records`` were (split ``test-set``).

    The encode and pool options are those that made ``features/<dict_id>/<records>``
    (``evaluate.coding_of``), so both feature sets come from the same dictionary, coder
    options and pooling. Test records of another shape are refused before anything is
    encoded. Runs inside a flow (the encode and pool flows' bodies, under their leases).

    Returns
    -------
    dict or None
        ``{"encode", "pool"}`` manifests of the test records; None for other splits.
    """
    if evaluate.split != "test-set":
        return None
    ws = Workspace.open(workspace)
    check_test_records(ws, records, evaluate.test_records)
    enc, pooling = coding_of(ws, records, dict_id)
    # The bad-chunk policy is the evaluation's, as for the records' features.
    encoded = encode_flow.fn(workspace, evaluate.test_records, dict_id=dict_id,
                             encode=dataclasses.replace(enc, on_bad_chunk=evaluate.on_bad_chunk),
                             runner=runner, break_lease=break_lease)
    pooled = pool_flow.fn(workspace, evaluate.test_records, dict_id=dict_id,
                          pool=dataclasses.replace(pooling, on_bad_chunk=evaluate.on_bad_chunk),
                          runner=runner, break_lease=break_lease)
    return {"encode": encoded, "pool": pooled}


def _log_scores(logger, manifest: dict) -> None:
    logger.info("evaluation %s of %s: features accuracy %.3f", manifest["run_id"],
                manifest["dict_id"], manifest["features"]["accuracy"])
    for name, versus in manifest.get("versus", {}).items():
        acc = versus["accuracy"]
        logger.info("  versus %s: %+.3f accuracy, 95%% interval [%+.3f, %+.3f]", name,
                    acc["difference"], acc["low"], acc["high"])


@flow(name="atomline-nightly", task_runner=task_runner("threads", 2))
def nightly_flow(workspace: str, records: str, labels: str | None = None,
                 train: TrainOptions = TrainOptions(), encode: EncodeOptions = EncodeOptions(),
                 pool: PoolOptions = PoolOptions(), evaluate: EvaluateOptions = EvaluateOptions(),
                 report: ReportOptions = ReportOptions(), gate: GateOptions = GateOptions(),
                 drift: DriftOptions = DriftOptions(), runner: RunnerOptions = FLOW_RUNNER,
                 break_lease: bool = False) -> State:
    """Train a candidate dictionary, encode, pool, evaluate, and promote it if it holds up.

    **Gate.** The candidate and the promoted dictionary are evaluated on the same rows
    and folds (same ``evaluate.seed`` and ``max_rows``); ``d`` is the candidate's ``metric``
    (``accuracy``, ``balanced_accuracy`` or ``macro_f1``) minus the promoted one's and
    ``[low, high]`` its paired-bootstrap 95 % interval (``gate``: ``GateOptions``). Outcome (``OUTCOMES``):
    ``regression`` when ``d < -tolerance``; ``promoted`` when ``d >= -tolerance`` and
    ``low >= -tolerance``; ``inconclusive`` otherwise (see ``stages.gate``).

    **Raw records and baselines.** A candidate that would be promoted — the first one
    too — must also beat the raw records on its own evaluation: its ``metric`` higher than
    a classifier's on the raw records, and the paired interval's low end not below
    ``-tolerance``; else the outcome is ``below_raw``. With ``gate.beat_baselines`` it must
    beat the best dictionary baseline (random patches or PCA) the same way, else
    ``below_baseline``. The candidate's evaluation always runs the baselines the gate
    reads (raw, and the dictionary ones with ``beat_baselines``), whatever
    ``evaluate.baselines`` holds.
    The pointer moves only after the candidate's features and evaluation are complete.
    Every decision is appended to the workspace (``Workspace.decisions``).

    **Reruns.** A decision is stored with the run's key (``gate.nightly_run_key`` over
    :func:`nightly_key_options`: the records' and labels' content and the deciding fields of
    the option objects). A run
    whose key was decided already — a rerun after a kill at any point, or a run on
    unchanged inputs — reports that decision (``already_decided`` holds its id) instead
    of evaluating and deciding again; what the earlier run left unfinished (chunks, an
    evaluation, pictures, the pointer move) is finished, and nothing is added twice.

    **Drift.** With ``drift.retrain_on_drift`` and a promoted dictionary, rows ``drift_since:``
    are compared with rows ``:drift_since`` (``stages.drift``); below ``drift_threshold``
    nothing is retrained (outcome ``steady``) and the promoted dictionary's features are
    brought up to date.

    **Options.** ``encode``, ``pool`` and ``evaluate`` apply to the candidate and to the
    promoted dictionary alike (the promoted one is encoded with its own coder unless
    ``encode.coder`` names one); ``train.seed`` seeds the training sample and the drift
    check, ``evaluate.seed`` the evaluation and the gate's bootstrap. ``evaluate.split``
    holds for both evaluations, so the gate compares scores on the same rows; with
    ``"test-set"`` the test records are encoded and pooled with each dictionary as the
    records were (:func:`test_set_features`).

    **Retrain policy.** ``gate.retrain`` (a key of :data:`RETRAIN`) decides whether a candidate
    is trained at all. A candidate's id follows the archive's fingerprint, so with
    ``"always"`` rows appended since the last run (``Workspace.append_records``) give a new
    candidate, encoded whole into its own codes group while the promoted features stay
    readable (and are brought up to date chunk by chunk for the gate). With
    ``"if-missing"`` or ``"never"`` and a promoted dictionary, only the chunks its codes do
    not cover yet are encoded and pooled; the outcome is ``kept``.

    **What the run shows.** The flow run ends in a state named after the outcome
    (``Promoted``, ``Regression``, …) with the outcome's meaning as its message: a
    ``Completed`` state, or a ``Failed`` one for a regression when
    ``gate.fail_on_regression`` (so automations and notifications on failed runs fire). A
    regression also emits the Prefect event ``atomline.nightly.regression``. Markdown
    and table artifacts summarise the evaluation; pictures are stored in the workspace.

    Returns
    -------
    State
        Calling the flow returns the report dict (the state's data): ``outcome`` (a key
        of :data:`OUTCOMES`), ``candidate`` and ``promoted`` evaluations, ``gate`` (the
        comparison), the train/encode/pool manifests, ``drift``, ``pictures``, the
        promoted id after the run, ``decision_id``, and ``already_decided`` (the id of
        the recorded decision reported instead of a new one, when there was one),
        ``references`` (the candidate against the raw records and the best baseline,
        ``gate.against_references``). With ``gate.fail_on_regression`` a regression raises
        instead; call with ``return_state=True`` to read the report from the state.
    """
    logger = get_run_logger()
    check_reachable(workspace)
    ws = open_workspace(workspace)
    run_key = nightly_run_key(ws, records, nightly_key_options(
        labels, train=train, encode=encode, pool=pool, evaluate=evaluate, report=report, gate=gate,
        drift=drift, runner=runner))
    recorded = recorded_decision(ws, run_key)
    # A run with these inputs was decided already (and maybe killed before it ended): replay
    # it against the dictionary that was promoted when it started. Every step below finds
    # its finished work (dictionary, chunks, evaluations, pictures) and redoes nothing.
    previous = recorded["previous_id"] if recorded else ws.promoted
    if recorded:
        logger.info("these inputs were decided by %s (%s); reporting that decision",
                    recorded["decision_id"], recorded["outcome"])
    check_retrain(gate.retrain, previous, workspace)
    if evaluate.split == "test-set":  # refused before anything is trained
        check_test_records(ws, records, evaluate.test_records)

    def features_for(dict_id: str) -> tuple[dict, dict]:
        enc = encode_flow.fn(workspace, records, dict_id=dict_id, encode=encode, runner=runner,
                             break_lease=break_lease)
        pooled = pool_flow.fn(workspace, records, dict_id=dict_id, pool=pool, runner=runner,
                              break_lease=break_lease)
        return enc, pooled

    night = {"previous_id": previous, "metric": gate.metric, "tolerance": gate.tolerance,
             "drift": None, "candidate": None, "promoted": None, "gate": None, "pictures": [],
             "references": None, "retrain": gate.retrain}
    if gate.retrain != "always" and previous is not None:
        night["encode"], night["pool"] = features_for(previous)
        night.update(candidate_id=None, outcome="kept")
        return _finish(workspace, records, night, gate.fail_on_regression, run_key, recorded)
    if drift.retrain_on_drift and previous is not None and drift.drift_since is not None:
        night["drift"] = detect_drift(workspace, records, previous, drift, seed=train.seed)
        logger.info("drift of rows %d: error %+.1f%%, nonzeros %+.1f%% (threshold %.0f%%)",
                    drift.drift_since, 100 * night["drift"]["error_change"],
                    100 * night["drift"]["nonzeros_change"], 100 * drift.drift_threshold)
        if not night["drift"]["drifted"]:
            night["encode"], night["pool"] = features_for(previous)
            night.update(candidate_id=None, outcome="steady")
            return _finish(workspace, records, night, gate.fail_on_regression, run_key, recorded)

    trained = train_flow.fn(workspace, records, train=train, break_lease=break_lease)
    candidate_id = trained["dict_id"]
    encoded, pooled = features_for(candidate_id)
    test_set_features(workspace, records, candidate_id, evaluate, runner, break_lease)
    # The gate reads the candidate's comparisons with the raw records (and the baselines).
    wanted = set(evaluate.baselines) | set(required_baselines(gate.beat_baselines))
    cand_eval = evaluate_task(workspace, records, candidate_id,
                              dataclasses.replace(evaluate, baselines=tuple(
                                  b for b in BASELINES if b in wanted)),
                              labels=labels, tag="candidate")
    references = against_references(cand_eval, metric=gate.metric, tolerance=gate.tolerance,
                                    beat_baselines=gate.beat_baselines)
    night.update(candidate_id=candidate_id, train=trained, encode=encoded, pool=pooled,
                 candidate=cand_eval, references=references)
    outcome = outcome_without_comparison(previous, candidate_id)
    if outcome is None:
        features_for(previous)
        test_set_features(workspace, records, previous, evaluate, runner, break_lease)
        prev_eval = evaluate_task(workspace, records, previous,
                                  dataclasses.replace(evaluate, baselines=(), learning_curve=()),
                                  labels=labels, tag="promoted")
        verdict = compare(workspace, cand_eval["run_id"], prev_eval["run_id"], metric=gate.metric,
                          tolerance=gate.tolerance, n_boot=evaluate.n_boot, seed=evaluate.seed)
        night.update(promoted=prev_eval, gate=verdict["gate"])
        outcome = verdict["outcome"]
    night["outcome"] = with_references(outcome, references)
    if report.pictures:
        night["pictures"] = render_task(workspace, cand_eval["run_id"], report.class_names)
    return _finish(workspace, records, night, gate.fail_on_regression, run_key, recorded)


def nightly_key_options(labels: str | None, **groups: Any) -> dict:
    """What of a nightly run's options its key (``gate.nightly_run_key``) hashes: the
    labels' name and, per option group (``train=TrainOptions(...)``, ...), the fields
    declared ``decides`` (:func:`~atomline.stages.options.deciding`); workers, pictures and
    alerts are not."""
    return {"labels": labels, **{name: deciding(options) for name, options in sorted(groups.items())}}


def _finish(workspace: str, records: str, report: dict, fail_on_regression: bool, run_key: str,
            recorded: dict | None) -> State:
    """Record the decision and promote when due (``gate.record_decision``), publish
    artifacts, and end in a named state."""
    logger = get_run_logger()
    ws = open_workspace(workspace)
    cand = report["candidate"]
    report.update(record_decision(ws, records, report, run_key=run_key, recorded=recorded))
    outcome = report["outcome"]
    message = f"{outcome}: {OUTCOMES[outcome]}"
    if recorded:
        message += f" (already decided by {recorded['decision_id']} on {recorded['created']})"
    lines = [f"**Outcome: {STATE_NAMES[outcome]}** — {OUTCOMES[outcome]}.",
             f"Candidate `{report['candidate_id']}`, previously promoted `{report['previous_id']}`, "
             f"promoted now `{report['promoted_id']}`."]
    if recorded:
        lines.append(f"These inputs were decided already by `{recorded['decision_id']}` "
                     f"({recorded['created']}); that decision is reported, not made again.")
    gate = report["gate"]
    if gate:
        lines.append(f"Gate on {report['metric']}: candidate {gate['a']:.3f}, promoted {gate['b']:.3f}, "
                     f"difference {gate['difference']:+.3f}, 95% interval [{gate['low']:+.3f}, "
                     f"{gate['high']:+.3f}], tolerance {report['tolerance']}.")
    if report.get("references"):
        lines += [line[0].upper() + line[1:] + "." for line in
                  describe_references(report["references"], report["metric"], report["tolerance"])]
    if report["drift"]:
        d = report["drift"]
        lines.append(f"Drift: reconstruction error {100 * d['error_change']:+.1f}%, nonzeros "
                     f"{100 * d['nonzeros_change']:+.1f}% (threshold {100 * d['threshold']:.0f}%).")
    chosen = settings_lines(report)
    if chosen:  # one markdown list: the heading, then one item per value
        lines.append("\n".join([chosen[0]] + [f"- {line.strip()}" for line in chosen[1:]]))
    lines.append(f"*{SCREENING}*")
    if cand:
        report["artifacts"] = publish_evaluation(ws, cand, records, title=f"atomline nightly: {records}",
                                                 lines=lines, picture_paths=report["pictures"])
        _log_scores(logger, cand)
    else:
        report["artifacts"] = {"summary": str(create_markdown_artifact(
            "\n\n".join([f"# atomline nightly: {records}"] + lines),
            key=artifact_key(records, "summary"), description="atomline nightly"))}
    if outcome == "regression":
        logger.warning("nightly outcome: %s", message)
        emit_event("atomline.nightly.regression",
                   resource={"prefect.resource.id": f"atomline.workspace.{records}",
                             "atomline.workspace": str(workspace)},
                   payload={"candidate_id": report["candidate_id"], "promoted_id": report["promoted_id"],
                            "gate": report["gate"], "decision_id": report["decision_id"]})
    else:
        logger.info("nightly outcome: %s", message)
    state = Failed if outcome == "regression" and fail_on_regression else Completed
    return state(data=report, name=STATE_NAMES[outcome], message=message)


def _run_name() -> str:
    """Name of the current flow run, for write leases (who holds an output)."""
    from prefect.runtime import flow_run

    return f"{flow_run.flow_name or 'atomline'}/{flow_run.name or flow_run.id or 'local'}"


def _record_skips(ws: Workspace, path: str, records: str) -> dict:
    """List the rows of skipped chunks in the output's attributes (one writer: the flow)."""
    info = ws.describe_records(records)
    return ws.output(path).record_skips(info["chunk_rows"], info["shape"][0])


def _promoted(workspace: str) -> str:
    return promoted_or_named(open_workspace(workspace), None)

