"""What each ``atomline`` command does: its checks against the workspace, then its run.

The ``_*_params`` functions turn parsed arguments into the keyword arguments of the flows and
of the preflight checks, so a command and its check always see the same values.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import threading
import time
from typing import Any, Callable

from .progress import _progress
from .reports import _describe_serve

#: The demo's train and pool options (the rest are the declared defaults). Measured on the
#: demo's 4000 records (seed 0, 5-fold accuracy): with one pass, 5 nonzeros and 2 regions the
#: learned dictionary scored 0.867 against 0.930 for the PCA dictionary baseline; with five
#: passes over the sample, 3 nonzeros and 4 regions (the shape rules' count for signals) it
#: scores 0.937 against PCA's 0.910 (difference +0.028, 95% interval [+0.017, +0.037]).
DEMO_TRAIN = dict(n_atoms=128, patch_size=64, stride=32, sample_patches=20_000,
                  coder_options={"n_nonzero": 3}, learner_options={"n_passes": 5})
DEMO_POOL = dict(regions=4)
#: The demo's gate also asks the features to beat the best dictionary baseline.
DEMO_GATE = dict(beat_baselines=True)


def _key_values(pairs: list[str]) -> dict:
    """``key=value`` pairs; values parsed as JSON when they parse (numbers, booleans)."""
    out = {}
    for pair in pairs or []:
        key, sep, text = pair.partition("=")
        if not sep:
            raise argparse.ArgumentTypeError(f"expected key=value, found {pair!r}")
        try:
            out[key] = json.loads(text)
        except json.JSONDecodeError:
            out[key] = text
    return out


def _coder_params(args: argparse.Namespace) -> dict | None:
    options = _key_values(args.coder_option)
    if args.nonzero is not None:
        options["n_nonzero"] = args.nonzero
    return options or None


def _train_params(args: argparse.Namespace) -> dict:
    return dict(n_atoms=args.atoms, patch_size=_one_or_list(args.patch_size),
                stride=_one_or_list(args.stride), method=args.method, coder=args.coder,
                coder_options=_coder_params(args), learner_options=_key_values(args.learner_option) or None,
                sample_patches=args.sample, seed=args.seed)


def _one_or_list(values: list[int] | None) -> int | list[int] | None:
    if values is None:
        return None
    return values[0] if len(values) == 1 else values


def _pool_params(args: argparse.Namespace) -> dict:
    return dict(reduce=args.reduce, split_sign=args.split_sign, regions=_one_or_list(args.regions))


def _evaluation_params(args: argparse.Namespace) -> dict:
    return dict(labels=args.labels, folds=args.folds, split=args.split,
                test_records=args.test_records, test_share=args.test_share, classifier=args.classifier,
                baselines=args.baselines, learning_curve=args.curve, n_boot=args.n_boot,
                max_rows=args.max_rows, pictures=args.pictures, class_names=args.class_names)


def _nightly_params(args: argparse.Namespace) -> dict:
    return dict(metric=args.metric, tolerance=args.tolerance, fail_on_regression=args.fail_on_regression,
                retrain_on_drift=args.retrain_on_drift, drift_since=args.drift_since,
                drift_threshold=args.drift_threshold, workers=args.workers, retrain=args.retrain,
                on_bad_chunk=args.on_bad_chunk, break_lease=args.break_lease,
                **_evaluation_params(args), **_train_params(args), **_pool_params(args))


def _evaluate_options(args: argparse.Namespace, **more: Any):
    from atomline.stages.options import EvaluateOptions

    return EvaluateOptions(folds=args.folds, classifier=args.classifier, baselines=args.baselines,
                           learning_curve=args.curve, n_boot=args.n_boot, max_rows=args.max_rows,
                           on_bad_chunk=args.on_bad_chunk, split=args.split,
                           test_records=args.test_records, test_share=args.test_share, **more)


def _report_options(args: argparse.Namespace):
    from atomline.stages.options import ReportOptions

    return ReportOptions(pictures=args.pictures, class_names=args.class_names)


def _nightly_groups(args: argparse.Namespace) -> dict:
    """The nightly flow's option objects from the command's flags (one ``--seed`` seeds the
    training and the evaluation, one ``--on-bad-chunk`` holds for every stage)."""
    from atomline.stages.options import (DriftOptions, EncodeOptions, GateOptions, PoolOptions,
                                         TrainOptions)

    from .parser import options_from_args

    return dict(
        labels=args.labels, train=TrainOptions(**_train_params(args)),
        encode=EncodeOptions(on_bad_chunk=args.on_bad_chunk),
        pool=PoolOptions(**_pool_params(args), on_bad_chunk=args.on_bad_chunk),
        evaluate=_evaluate_options(args, seed=args.seed), report=_report_options(args),
        gate=options_from_args(GateOptions, args),
        drift=DriftOptions(retrain_on_drift=args.retrain_on_drift, drift_since=args.drift_since,
                           drift_threshold=args.drift_threshold),
        runner=_runner(args), break_lease=args.break_lease)


def _runner(args: argparse.Namespace):
    """The command's :class:`~atomline.stages.options.RunnerOptions`, from its flags."""
    from atomline.stages.options import RunnerOptions

    from .parser import options_from_args

    return options_from_args(RunnerOptions, args)


def _with_runner(flow, args: argparse.Namespace):
    """The flow with the task runner the command's runner flags describe (direct runs and
    ``serve`` alike)."""
    from atomline.flows.runners import runner_for

    return flow.with_options(task_runner=runner_for(_runner(args)))


# ---------------------------------------------------------------------------- checks
# Each flow command's arguments, checked against the workspace before anything starts.
def _check_demo(args):
    _runner(args)  # the runner options, checked as they are made (workers, kind, address)


def _check_train(args):
    from atomline.flows import preflight

    _runner(args)  # the runner options, checked as they are made (workers, kind, address)
    preflight.check_train(args.workspace, args.name, **_train_params(args))


def _check_encode(args):
    from atomline.flows import preflight

    _runner(args)  # the runner options, checked as they are made (workers, kind, address)
    preflight.check_encode(args.workspace, args.name, dict_id=args.dictionary, coder=args.coder,
                           coder_options=_coder_params(args))


def _check_pool(args):
    from atomline.flows import preflight

    _runner(args)  # the runner options, checked as they are made (workers, kind, address)
    preflight.check_pool(args.workspace, args.name, dict_id=args.dictionary, regions=_one_or_list(args.regions))


def _check_evaluate(args):
    from atomline.flows import preflight

    _runner(args)  # the runner options, checked as they are made (workers, kind, address)
    preflight.check_evaluate(args.workspace, args.name, dict_id=args.dictionary, **_evaluation_params(args))
    _evaluate_options(args)  # the evaluation's options, checked as they are made (split, ...)


def _check_nightly(args):
    from atomline.flows import preflight

    _runner(args)  # the runner options, checked as they are made (workers, kind, address)
    preflight.check_nightly(args.workspace, args.name, **_nightly_params(args))
    _evaluate_options(args)  # the evaluation's options, checked as they are made (split, ...)


def _check_serve(args):
    from atomline.flows import preflight

    _runner(args)  # the runner options, checked as they are made (workers, kind, address)
    preflight.check_cron(args.cron, args.timezone)
    preflight.check_nightly(args.workspace, args.name, **_nightly_params(args))


# ---------------------------------------------------------------------------- commands
def _run_add_records(args):
    from atomline.stages.errors import NotFound
    from atomline.stages.workspace import Workspace, load_npy

    source = load_npy(args.file, mmap=True)  # a missing or foreign file is refused before anything is made
    try:
        ws, created = Workspace.open(args.workspace), False
    except NotFound:
        ws, created = Workspace.open(args.workspace, create=True), True
    try:
        return ws.add_records(args.name, source, chunk_rows=args.chunk_rows, overwrite=args.overwrite,
                              kind="vectors" if args.vectors else None)
    except BaseException:
        if created:  # the first records were refused: leave no empty workspace behind
            _remove_new_workspace(ws)
        raise


def _remove_new_workspace(ws) -> None:
    """Delete a workspace this command created and nothing was stored in."""
    from fsspec.core import url_to_fs

    fs, path = url_to_fs(ws.url, **(ws.storage_options or {}))
    fs.rm(path, recursive=True)


def _run_add_labels(args):
    from atomline.stages.workspace import Workspace

    return Workspace.open(args.workspace).add_labels(args.name, args.file, overwrite=args.overwrite)


def _run_append(args):
    from atomline.stages.workspace import Workspace

    return Workspace.open(args.workspace).append_records(args.name, args.file, labels=args.labels_file)


def _run_link(args):
    from atomline.stages.workspace import Workspace

    ws = Workspace.open(args.workspace, create=True)
    return ws.link_records(args.name, args.url, args.path, overwrite=args.overwrite)


def _run_train_encoder(args):
    from atomline.flows.pipeline import _promoted
    from atomline.stages.train import train_encoder

    with _progress(args.workspace, args.name, (), args.json, status="training an encoder"):
        return train_encoder(args.workspace, args.name, args.dictionary or _promoted(args.workspace),
                             name=args.encoder, target=args.target,
                             target_options=_key_values(args.target_option), n_layers=args.layers,
                             sample_patches=args.sample, seed=args.seed)


def _run_train(args):
    from atomline.flows import train_flow
    from atomline.stages.options import TrainOptions

    with _progress(args.workspace, args.name, (), args.json, status="learning a dictionary"):
        return _with_runner(train_flow, args)(args.workspace, args.name, break_lease=args.break_lease,
                                              train=TrainOptions(**_train_params(args)))


def _run_encode(args):
    from atomline.flows import encode_flow
    from atomline.stages.options import EncodeOptions

    with _progress(args.workspace, args.name, ("codes",), args.json):
        return _with_runner(encode_flow, args)(
            args.workspace, args.name, dict_id=args.dictionary,
            encode=EncodeOptions(coder=args.coder, coder_options=_coder_params(args),
                                 on_bad_chunk=args.on_bad_chunk),
            runner=_runner(args), overwrite=args.overwrite, break_lease=args.break_lease)


def _run_pool(args):
    from atomline.flows import pool_flow
    from atomline.stages.options import PoolOptions

    with _progress(args.workspace, args.name, ("features",), args.json):
        return _with_runner(pool_flow, args)(
            args.workspace, args.name, dict_id=args.dictionary,
            pool=PoolOptions(**_pool_params(args), on_bad_chunk=args.on_bad_chunk),
            runner=_runner(args), overwrite=args.overwrite, break_lease=args.break_lease)


def _run_evaluate(args):
    from atomline.flows import evaluate_flow

    with _progress(args.workspace, args.name, (), args.json, status="evaluating"):
        return _with_runner(evaluate_flow, args)(args.workspace, args.name, dict_id=args.dictionary,
                                                 labels=args.labels, evaluate=_evaluate_options(args),
                                                 report=_report_options(args))


def _run_search(args):
    from atomline.flows.search import search_flow
    from atomline.stages.options import SearchOptions

    from .parser import options_from_args

    result = _with_runner(search_flow, args)(args.workspace, args.name, labels=args.labels,
                                              search=options_from_args(SearchOptions, args),
                                              recipe=args.recipe)
    return {k: v for k, v in result.items() if k != "trials"}


def _run_nightly(args):
    from atomline.flows import nightly_flow

    with _progress(args.workspace, args.name, ("codes", "features"), args.json, status="nightly run"):
        state = _with_runner(nightly_flow, args)(args.workspace, args.name, return_state=True,
                                                 **_nightly_groups(args))
    report = state.result(raise_on_failure=False)
    if isinstance(report, BaseException):
        # A run that failed on an error holds the exception as its result, not a report
        # (a Failed run for a regression holds its report): raise it, to be reported once.
        raise report
    report["state"] = {"type": state.type.value, "name": state.name, "message": state.message}
    return report


def _served(args: argparse.Namespace):
    """The flow ``atomline serve`` serves, with the command's task runner, and its deployment
    settings (name, cron schedule, parameters)."""
    from prefect.schedules import Cron

    from atomline.flows import nightly_flow

    import dataclasses

    # A deployment's parameters are JSON: each option object as the dict of its fields.
    params = {k: json.loads(json.dumps(dataclasses.asdict(v))) if dataclasses.is_dataclass(v) else v
              for k, v in _nightly_groups(args).items()}
    params.update(workspace=args.workspace, records=args.name)
    settings = dict(name=args.deployment or f"atomline-nightly-{args.name}",
                    schedule=Cron(args.cron, timezone=args.timezone), parameters=params,
                    description=f"atomline nightly flow over data/{args.name} of {args.workspace}",
                    tags=["atomline"])
    return _with_runner(nightly_flow, args), settings


def serve_deployment(args: argparse.Namespace):
    """The deployment ``atomline serve`` serves: the nightly flow, a cron schedule, parameters."""
    flow, settings = _served(args)
    return flow.to_deployment(**settings)


def _run_serve(args):
    flow, settings = _served(args)
    deployment = flow.to_deployment(**settings)
    info = {"deployment": deployment.name, "flow": deployment.flow_name,
            "schedules": [{"cron": s.schedule.cron, "timezone": s.schedule.timezone}
                          for s in deployment.schedules or []],
            "parameters": deployment.parameters, "served": not args.dry_run}
    if not args.dry_run:
        print(_describe_serve(info), file=sys.stderr)
        # The flow object is served, not a deployment: Prefect's serve of a deployment runs
        # the flow loaded from its entrypoint, with the decorator's default task runner, so
        # --workers would only cut batches while two threads ran them.
        _until_interrupted(lambda: flow.serve(**settings))  # blocks: runs the flow on schedule
    return info


def _until_interrupted(serve: Callable[..., Any], *deployments: Any) -> None:
    """Serve until Ctrl-C, then raise KeyboardInterrupt (so the command exits 130).

    Prefect's ``serve`` catches the KeyboardInterrupt of Ctrl-C and returns normally, so
    the signal is recorded on its way in: a serve that ended because of it is an interrupt.
    """
    import signal

    interrupted = threading.Event()

    def on_interrupt(signum: int, frame: Any) -> None:
        interrupted.set()
        signal.default_int_handler(signum, frame)  # raises KeyboardInterrupt, as usual

    previous = signal.signal(signal.SIGINT, on_interrupt)
    try:
        serve(*deployments)
    finally:
        signal.signal(signal.SIGINT, previous)
    if interrupted.is_set():
        raise KeyboardInterrupt


def _run_history(args):
    from atomline.stages.gate import best_baseline
    from atomline.stages.workspace import Workspace

    ws = Workspace.open(args.workspace)
    decided = {d["candidate_run"]: d for d in ws.decisions() if d.get("candidate_run")}
    rows = []
    for e in ws.evaluations():
        if args.name and e["records"] != args.name:
            continue
        m, best = e["metrics"], best_baseline(e, "accuracy")
        decision = decided.get(e["run_id"], {})
        rows.append({
            "run_id": e["run_id"], "created": e["created"], "records": e["records"], "tag": e.get("tag", ""),
            "dict_id": e["dict_id"], "coder": e.get("coder"), "coder_options": e.get("coder_options"),
            "pooling": e.get("pooling"), "records_fingerprint": e.get("records_fingerprint"),
            "n_rows": e.get("n_rows"), "accuracy": m["features"]["accuracy"],
            "macro_f1": m["features"]["macro_f1"],
            "raw_accuracy": m.get("raw", {}).get("accuracy"),
            "baseline": best, "baseline_accuracy": m[best]["accuracy"] if best else None,
            "outcome": decision.get("outcome"),
        })
    return {"workspace": ws.url, "promoted": ws.promoted, "evaluations": rows, "decisions": ws.decisions()}


def _run_plots(args):
    from atomline.stages.workspace import Workspace

    ws = Workspace.open(args.workspace)
    pictures = ws.pictures()
    if args.export:
        for p in pictures:
            target = os.path.join(args.export, p["report_id"], f"{p['name']}.png")
            os.makedirs(os.path.dirname(target), exist_ok=True)
            with open(target, "wb") as fh:
                fh.write(ws.picture(p["path"]))
            p["file"] = os.path.abspath(target)
    return {"workspace": ws.url, "pictures": pictures}


def _run_show(args):
    from atomline.stages.workspace import Workspace

    return Workspace.open(args.workspace).summary()


def _run_demo(args):
    from atomline.flows import nightly_flow
    from atomline.flows.demo import CLASS_NAMES, vibration_records
    from atomline.stages.options import (EvaluateOptions, GateOptions, PoolOptions, ReportOptions,
                                         TrainOptions)
    from atomline.stages.workspace import Workspace

    started = time.perf_counter()
    ws = Workspace.open(args.directory, create=True)
    if "vibration" not in ws.root["data"]:
        records, labels = vibration_records(args.records, seed=args.seed)
        ws.add_records("vibration", records, chunk_rows=250)
        ws.add_labels("vibration", labels)
    with _progress(args.directory, "vibration", ("codes", "features"), args.json, status="demo nightly run"):
        report = _with_runner(nightly_flow, args)(
            args.directory, "vibration", train=TrainOptions(**DEMO_TRAIN, seed=args.seed),
            pool=PoolOptions(**DEMO_POOL), evaluate=EvaluateOptions(seed=args.seed),
            report=ReportOptions(class_names=CLASS_NAMES), gate=GateOptions(**DEMO_GATE),
            runner=_runner(args))
    dictionary = ws.load_dictionary(report["candidate_id"])
    report["dictionary"] = {k: dictionary.attrs[k] for k in ("n_atoms", "n_features", "method", "coder",
                                                             "coder_options", "geometry")}
    report["dictionary"]["coherence"] = dictionary.attrs["diagnostics"].get("coherence")
    report["classes"] = list(CLASS_NAMES)
    report["workspace"] = os.path.abspath(args.directory)
    report["seconds"] = time.perf_counter() - started
    return report
