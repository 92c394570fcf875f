"""The ``atomline`` command.

Every command takes the workspace as a directory or fsspec URL, prints a short human
report, or JSON with ``--json``. Flows run locally through Prefect; with no Prefect server
configured (``PREFECT_API_URL``), a flow command starts a temporary one for the run and stops
it afterwards (see ``flows/_server.py``). Arguments are checked against the workspace first
(``flows/preflight.py``), so a mistake is refused before any server starts.

    atomline demo [DIR]                      build the demo workspace and run the nightly flow
    atomline add-records WS NAME FILE.npy    copy records in, chunk by chunk
    atomline add-labels WS NAME FILE.npy     integer labels, one per record
    atomline link-records WS NAME URL        use an existing Zarr array without copying
    atomline append-records WS NAME FILE.npy rows that arrived since (nightly encodes only them)
    atomline train|encode|pool|evaluate WS NAME    run one stage's flow
    atomline nightly WS NAME                 train → encode → pool → evaluate → promote
    atomline show WS                         what the workspace holds
    atomline history WS [NAME]               accuracy of every evaluation, and the gate's decisions
    atomline plots WS [--export DIR]         list the stored pictures, or write them as PNG files
    atomline serve WS NAME --cron "0 2 * * *"   serve the nightly flow on a schedule (Prefect)
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import threading
import time
import warnings
from typing import Any, Callable

DEMO_OPTIONS = dict(n_atoms=128, patch_size=64, stride=32, regions=2, sample_patches=20_000)


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``atomline`` command; returns the exit status.

    0 on success; 2 for an error atomline raises on purpose (:class:`AtomlineError`: the
    message says what to do); 1 for anything unexpected (one paragraph on stderr, the full
    traceback in a log file); 130 when interrupted. ``--debug`` also prints the traceback.
    """
    args = _parser().parse_args(argv)
    _quiet_prefect(args.verbose)
    from atomline.stages.errors import AtomlineError

    try:
        result = _run(args)
    except KeyboardInterrupt:
        return _fail(args, "Interrupted", "interrupted; finished chunks are kept, a rerun resumes", 130)
    except AtomlineError as exc:
        return _fail(args, type(exc).__name__, str(exc), 2)
    except Exception as exc:  # anything not raised on purpose: one paragraph and a log file
        try:
            log = _write_log(args, exc)
            where = f"the full traceback is in {log}"
        except OSError as failed:  # an unwritable log directory must not hide the error
            log, where = None, f"no log file could be written ({failed})"
        message = (f"unexpected {type(exc).__name__}: {exc}. This is not a known atomline error, "
                   f"so it may be a bug; {where}. Rerun with --debug to see the traceback here, "
                   f"and include the log file when reporting it.")
        return _fail(args, type(exc).__name__, message, 1, log=log)
    if args.json:
        print(json.dumps(result, indent=2, default=_plain))
    else:
        print(args.describe(result) if hasattr(args, "describe") else json.dumps(result, indent=2))
    return 0


#: Commands that run Prefect flows, so need a Prefect API (a temporary server if none is set).
FLOW_COMMANDS = ("demo", "train", "encode", "pool", "evaluate", "nightly", "serve")


def _run(args: argparse.Namespace) -> Any:
    """Check the arguments against the workspace, then run the command (with Prefect if needed)."""
    if hasattr(args, "check"):
        args.check(args)  # refuses mistakes before any flow or server starts
    if args.command not in FLOW_COMMANDS or getattr(args, "dry_run", False):
        return args.run(args)
    from atomline.flows._server import temporary_server

    with temporary_server():
        return args.run(args)


def _fail(args: argparse.Namespace, kind: str, message: str, status: int, log: str | None = None) -> int:
    """Report an error: the message on stderr (JSON on stdout with ``--json``); the status."""
    if args.debug and status != 130:
        import traceback

        traceback.print_exc(file=sys.stderr)
    if args.json:
        print(json.dumps({"error": kind, "message": message, "exit_status": status, "log": log}))
    else:
        print(f"atomline: {kind}: {message}" if status != 130 else f"atomline: {message}", file=sys.stderr)
    return status


#: Where the full log of an unexpected error goes when ``ATOMLINE_LOG_DIR`` is not set.
DEFAULT_LOG_DIR = os.path.join("~", ".cache", "atomline", "logs")


def _write_log(args: argparse.Namespace, exc: BaseException) -> str:
    """Write the command, versions and traceback of an unexpected error; return the file's path."""
    import platform
    import traceback

    directory = os.path.expanduser(os.environ.get("ATOMLINE_LOG_DIR") or DEFAULT_LOG_DIR)
    os.makedirs(directory, exist_ok=True)
    path = os.path.join(directory, time.strftime("atomline-%Y%m%d-%H%M%S") + f"-{os.getpid()}.log")
    with open(path, "w") as fh:
        fh.write(f"command: atomline {' '.join(sys.argv[1:]) or args.command}\n")
        fh.write(f"python {platform.python_version()} on {platform.platform()}\n\n")
        fh.write("".join(traceback.format_exception(exc)))
    return path


def _quiet_prefect(verbose: bool) -> None:
    """Offline-friendly, quiet Prefect defaults; set before Prefect is imported."""
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    if not verbose:
        os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
        os.environ.setdefault("PREFECT_LOGGING_TO_API_ENABLED", "false")
        # A flow or task ended by an error logs it with its traceback on these loggers; the
        # CLI reports the error itself, once, so they stay quiet below CRITICAL.
        os.environ.setdefault("PREFECT_LOGGING_LOGGERS_PREFECT_FLOW_RUNS_LEVEL", "CRITICAL")
        os.environ.setdefault("PREFECT_LOGGING_LOGGERS_PREFECT_TASK_RUNS_LEVEL", "CRITICAL")
        # Prefect's own Python warnings (settings it could not apply, deprecations) are for
        # its developers; --verbose shows them.
        warnings.filterwarnings("ignore", module=r"prefect(\.|$)")


def _plain(value: Any) -> Any:
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    return str(value)


# ---------------------------------------------------------------------------- parser
def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="atomline",
        description="Sparse-code features for large signal archives, as Prefect flows over a Zarr workspace.",
    )
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name: str, run: Callable, describe: Callable | None, help: str,
                check: Callable | None = None) -> argparse.ArgumentParser:
        sp = sub.add_parser(name, help=help, description=help)
        sp.set_defaults(run=run, **({"describe": describe} if describe else {}),
                        **({"check": check} if check else {}))
        sp.add_argument("--json", action="store_true", help="print the result as JSON for other tools")
        sp.add_argument("--verbose", action="store_true", help="show Prefect's own log lines")
        sp.add_argument("--debug", action="store_true", help="on an error, also print its traceback")
        return sp

    sp = command("demo", _run_demo, _describe_demo,
                 "build the synthetic vibration workspace and run the nightly flow on it", _check_demo)
    sp.add_argument("directory", nargs="?", default="atomline-demo.zarr",
                    help="workspace directory to create or reuse (default: %(default)s)")
    sp.add_argument("--records", type=int, default=4000, help="number of synthetic records (default: %(default)s)")
    sp.add_argument("--seed", type=int, default=0, help="seed of the data and the pipeline (default: %(default)s)")
    _runner_options(sp)

    sp = command("add-records", _run_add_records, _describe_records, "copy records from a .npy file into data/NAME")
    _ws_name(sp)
    sp.add_argument("file", help=".npy file of shape (n, L), (n, H, W) or (n, H, W, C), float32/float64; streamed")
    sp.add_argument("--chunk-rows", type=int, help="rows per Zarr chunk (default: about 4 MiB per chunk)")
    sp.add_argument("--overwrite", action="store_true", help="replace existing records of that name")

    sp = command("add-labels", _run_add_labels, None, "store integer labels for data/NAME from a .npy file")
    _ws_name(sp)
    sp.add_argument("file", help=".npy file of shape (n,), integer classes")
    sp.add_argument("--overwrite", action="store_true", help="replace existing labels")

    sp = command("append-records", _run_append, _describe_records,
                 "append rows from a .npy file to data/NAME (later runs encode only the new chunks)")
    _ws_name(sp)
    sp.add_argument("file", help=".npy file of new rows, same row shape and dtype as data/NAME; streamed")
    sp.add_argument("--labels", dest="labels_file",
                    help=".npy file of their integer labels (required if NAME is labelled)")

    sp = command("link-records", _run_link, _describe_records,
                 "use an existing Zarr array (any store URL) as data/NAME without copying it")
    _ws_name(sp)
    sp.add_argument("url", help="store holding the array (directory or fsspec URL)")
    sp.add_argument("--path", default="", help="path of the array inside that store")
    sp.add_argument("--overwrite", action="store_true", help="replace an existing entry of that name")

    sp = command("train", _run_train, None, "learn a dictionary from a sample of data/NAME", _check_train)
    _ws_name(sp)
    _train_options(sp)
    _fault_options(sp, bad_chunks=False)
    _runner_options(sp)

    sp = command("train-encoder", _run_train_encoder, None,
                 "train a learned fast encoder (unrolled ISTA) that imitates a coder, stored with the dictionary")
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    sp.add_argument("--encoder", default="learned", help="name to store it under (default: %(default)s)")
    sp.add_argument("--target", default="fista", help="coder to imitate (default: %(default)s)")
    sp.add_argument("--target-option", action="append", metavar="KEY=VALUE",
                    help="an option of the target coder, repeatable (e.g. lam=0.5)")
    sp.add_argument("--layers", type=int, default=3, help="thresholding layers (default: %(default)s)")
    sp.add_argument("--sample", type=int, default=5000, help="training patches (default: %(default)s)")
    sp.add_argument("--seed", type=int, default=0, help="seed (default: %(default)s)")

    sp = command("encode", _run_encode, _describe_stage, "sparse-code every chunk of data/NAME (resumes)",
                 _check_encode)
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    _coder_options(sp, default=None)
    sp.add_argument("--overwrite", action="store_true", help="replace codes made from other inputs")
    _fault_options(sp)
    _runner_options(sp)

    sp = command("pool", _run_pool, _describe_stage, "pool the codes of data/NAME into per-record features (resumes)",
                 _check_pool)
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    _pool_options(sp)
    sp.add_argument("--overwrite", action="store_true", help="replace features made with other options")
    _fault_options(sp)
    _runner_options(sp)

    sp = command("evaluate", _run_evaluate, _describe_evaluation,
                 "score a linear classifier on the features against the raw records", _check_evaluate)
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    _evaluation_options(sp)
    _bad_chunk_option(sp)
    _runner_options(sp)

    sp = command("nightly", _run_nightly, _describe_nightly,
                 "train a candidate dictionary, encode, pool, evaluate, and promote it if it holds up",
                 _check_nightly)
    _ws_name(sp)
    _nightly_options(sp)
    _runner_options(sp)

    sp = command("serve", _run_serve, _describe_serve,
                 "serve the nightly flow on a cron schedule with Prefect (runs until stopped)", _check_serve)
    _ws_name(sp)
    sp.add_argument("--cron", default="0 2 * * *", help="cron schedule (default: '%(default)s', 02:00 daily)")
    sp.add_argument("--timezone", default="UTC", help="time zone of the schedule (default: %(default)s)")
    sp.add_argument("--deployment", help="deployment name (default: atomline-nightly-NAME)")
    sp.add_argument("--dry-run", action="store_true",
                    help="build the deployment and print it, without serving")
    _nightly_options(sp)
    sp.add_argument("--workers", type=int, default=os.cpu_count() or 1,
                    help="parallel workers per run (default: %(default)s)")

    sp = command("history", _run_history, _describe_history,
                 "the accuracy of every evaluation and the promotion gate's decisions")
    sp.add_argument("workspace", help="workspace directory or URL")
    sp.add_argument("name", nargs="?", help="only evaluations of data/NAME")

    sp = command("plots", _run_plots, _describe_plots, "list the stored pictures, or export them as PNG files")
    sp.add_argument("workspace", help="workspace directory or URL")
    sp.add_argument("--export", metavar="DIR", help="write every picture to DIR/<run-id>/<name>.png")

    sp = command("show", _run_show, _describe_show, "list what a workspace holds")
    sp.add_argument("workspace", help="workspace directory or URL")
    return p


def _fault_options(sp: argparse.ArgumentParser, bad_chunks: bool = True) -> None:
    sp.add_argument("--break-lease", action="store_true",
                    help="take the output's write lease even if another run holds it "
                         "(only when you know that run is dead; finished chunks are kept)")
    if bad_chunks:
        _bad_chunk_option(sp)


def _bad_chunk_option(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--on-bad-chunk", choices=("stop", "skip"), default="stop",
                    help="a missing or unreadable input chunk stops the run, or is skipped "
                         "and its rows left out and listed (default: %(default)s)")


def _ws_name(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("workspace", help="workspace directory or URL (memory://…, s3://…)")
    sp.add_argument("name", help="name of the records array (data/NAME)")


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


def _coder_options(sp: argparse.ArgumentParser, default: str | None = "omp") -> None:
    sp.add_argument("--coder", default=default,
                    help="sparse coder by its trade name, e.g. omp (default: %s)"
                    % (default or "the one the dictionary was trained with"))
    sp.add_argument("--nonzero", type=int, help="nonzeros per patch for greedy coders (option n_nonzero)")
    sp.add_argument("--coder-option", action="append", metavar="KEY=VALUE",
                    help="any other option of the coder, repeatable (e.g. tol=0.01)")


def _coder_params(args: argparse.Namespace) -> dict | None:
    options = _key_values(args.coder_option)
    if args.nonzero is not None:
        options["n_nonzero"] = args.nonzero
    return options or None


def _train_options(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--atoms", type=int, default=128, help="number of atoms k (default: %(default)s)")
    sp.add_argument("--patch-size", type=int, nargs="+",
                    help="patch length (1-D) or height width (images); whole record if omitted")
    sp.add_argument("--stride", type=int, nargs="+", help="step between patches (default: the patch size)")
    sp.add_argument("--method", default="online", help="dictionary learner (default: %(default)s)")
    sp.add_argument("--learner-option", action="append", metavar="KEY=VALUE",
                    help="any option of the learner, repeatable (e.g. n_passes=2)")
    sp.add_argument("--sample", type=int, default=20_000, help="training patches sampled (default: %(default)s)")
    sp.add_argument("--seed", type=int, default=0, help="seed (default: %(default)s)")
    _coder_options(sp)


def _train_params(args: argparse.Namespace) -> dict:
    return dict(n_atoms=args.atoms, patch_size=_one_or_list(args.patch_size),
                stride=_one_or_list(args.stride), method=args.method, coder=args.coder,
                coder_options=_coder_params(args), learner_options=_key_values(args.learner_option) or None,
                sample_patches=args.sample, seed=args.seed)


def _one_or_list(values: list[int] | None) -> int | list[int] | None:
    if values is None:
        return None
    return values[0] if len(values) == 1 else values


def _pool_options(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--reduce", choices=("max", "mean"), default="max",
                    help="how each region's coefficients become one number (default: %(default)s)")
    sp.add_argument("--no-split-sign", dest="split_sign", action="store_false",
                    help="pool |z| instead of positive and negative parts separately")
    sp.add_argument("--regions", type=int, nargs="+", default=[4],
                    help="equal parts per spatial axis of the patch grid (default: 4)")


def _pool_params(args: argparse.Namespace) -> dict:
    return dict(reduce=args.reduce, split_sign=args.split_sign, regions=_one_or_list(args.regions))


def _evaluation_options(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--labels", help="labels array name (default: NAME)")
    sp.add_argument("--folds", type=int, default=5, help="stratified cross-validation folds (default: %(default)s)")
    sp.add_argument("--classifier", choices=("logistic", "linear-svm"), default="logistic",
                    help="linear classifier on standardised features (default: %(default)s)")
    sp.add_argument("--baselines", nargs="*", choices=("raw", "random_patches", "pca"),
                    default=["raw", "random_patches", "pca"],
                    help="feature sets compared with the sparse features (default: all three)")
    sp.add_argument("--curve", type=float, nargs="*", default=[0.05, 0.15, 0.4],
                    help="shares of the training rows on the learning curve; none to skip (default: %(default)s)")
    sp.add_argument("--n-boot", type=int, default=2000, help="bootstrap resamples (default: %(default)s)")
    sp.add_argument("--max-rows", type=int, default=20_000,
                    help="labelled rows used at most, stratified sample (default: %(default)s)")
    sp.add_argument("--class-names", nargs="+", help="names of the classes, in label order, for pictures")
    sp.add_argument("--no-pictures", dest="pictures", action="store_false",
                    help="do not render and store the pictures")


def _evaluation_params(args: argparse.Namespace) -> dict:
    return dict(labels=args.labels, folds=args.folds, classifier=args.classifier,
                baselines=args.baselines, learning_curve=args.curve, n_boot=args.n_boot,
                max_rows=args.max_rows, pictures=args.pictures, class_names=args.class_names)


def _nightly_options(sp: argparse.ArgumentParser) -> None:
    _train_options(sp)
    _pool_options(sp)
    _evaluation_options(sp)
    sp.add_argument("--metric", choices=("accuracy", "balanced_accuracy", "macro_f1"), default="accuracy",
                    help="score compared by the promotion gate (default: %(default)s)")
    sp.add_argument("--tolerance", type=float, default=0.01,
                    help="promote unless the candidate scores worse than the promoted one by more "
                         "than this, or its interval reaches below it (default: %(default)s)")
    sp.add_argument("--fail-on-regression", action="store_true",
                    help="end a regressed run in a Failed state (default: Completed, named Regression)")
    sp.add_argument("--retrain-on-drift", action="store_true",
                    help="retrain only when rows from --drift-since on drifted from the earlier ones")
    sp.add_argument("--drift-since", type=int, help="first new row for the drift check")
    sp.add_argument("--retrain", choices=("always", "if-missing", "never"), default="always",
                    help="always: train a candidate every run; if-missing/never: keep the promoted "
                         "dictionary and encode only records it has not covered yet (default: %(default)s)")
    sp.add_argument("--drift-threshold", type=float, default=0.2,
                    help="relative change of reconstruction error or nonzeros that counts as drift (default: %(default)s)")
    _fault_options(sp)


def _nightly_params(args: argparse.Namespace) -> dict:
    return dict(metric=args.metric, tolerance=args.tolerance, fail_on_regression=args.fail_on_regression,
                retrain_on_drift=args.retrain_on_drift, drift_since=args.drift_since,
                drift_threshold=args.drift_threshold, workers=args.workers, retrain=args.retrain,
                on_bad_chunk=args.on_bad_chunk, break_lease=args.break_lease,
                **_evaluation_params(args), **_train_params(args), **_pool_params(args))


def _runner_options(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--runner", choices=("threads", "processes", "dask"), default="threads",
                    help="Prefect task runner (default: %(default)s)")
    sp.add_argument("--workers", type=int, default=os.cpu_count() or 1,
                    help="parallel workers (default: the number of cores, %(default)s)")
    sp.add_argument("--dask-address", help="scheduler address of an existing Dask cluster")
    sp.add_argument("--batches-per-worker", type=int, default=4,
                    help="batches of whole chunks per worker, one Prefect task each (default: %(default)s)")


def _with_runner(flow, args: argparse.Namespace):
    from atomline.flows.runners import task_runner

    return flow.with_options(task_runner=task_runner(args.runner, args.workers, args.dask_address))


# ---------------------------------------------------------------------------- checks
# Each flow command's arguments, checked against the workspace before anything starts.
def _check_demo(args):
    from atomline.flows import preflight

    preflight.check_runner(args.workers)


def _check_train(args):
    from atomline.flows import preflight

    preflight.check_runner(args.workers)
    preflight.check_train(args.workspace, args.name, **_train_params(args))


def _check_encode(args):
    from atomline.flows import preflight

    preflight.check_runner(args.workers)
    preflight.check_encode(args.workspace, args.name, dict_id=args.dictionary, coder=args.coder,
                           coder_options=_coder_params(args))


def _check_pool(args):
    from atomline.flows import preflight

    preflight.check_runner(args.workers)
    preflight.check_pool(args.workspace, args.name, dict_id=args.dictionary, regions=_one_or_list(args.regions))


def _check_evaluate(args):
    from atomline.flows import preflight

    preflight.check_runner(args.workers)
    preflight.check_evaluate(args.workspace, args.name, dict_id=args.dictionary, **_evaluation_params(args))


def _check_nightly(args):
    from atomline.flows import preflight

    preflight.check_nightly(args.workspace, args.name, **_nightly_params(args))


def _check_serve(args):
    from atomline.flows import preflight

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
        return ws.add_records(args.name, source, chunk_rows=args.chunk_rows, overwrite=args.overwrite)
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

    with _progress(args.workspace, args.name, (), args.json, status="learning a dictionary"):
        return _with_runner(train_flow, args)(args.workspace, args.name, break_lease=args.break_lease, **_train_params(args))


def _run_encode(args):
    from atomline.flows import encode_flow

    with _progress(args.workspace, args.name, ("codes",), args.json):
        return _with_runner(encode_flow, args)(
            args.workspace, args.name, dict_id=args.dictionary, coder=args.coder,
            coder_options=_coder_params(args), workers=args.workers, overwrite=args.overwrite,
            batches_per_worker=args.batches_per_worker,
            on_bad_chunk=args.on_bad_chunk, break_lease=args.break_lease)


def _run_pool(args):
    from atomline.flows import pool_flow

    with _progress(args.workspace, args.name, ("features",), args.json):
        return _with_runner(pool_flow, args)(args.workspace, args.name, dict_id=args.dictionary,
                                             workers=args.workers, overwrite=args.overwrite,
                                             on_bad_chunk=args.on_bad_chunk, break_lease=args.break_lease,
                                             batches_per_worker=args.batches_per_worker,
                                             **_pool_params(args))


def _run_evaluate(args):
    from atomline.flows import evaluate_flow

    with _progress(args.workspace, args.name, (), args.json, status="evaluating"):
        return _with_runner(evaluate_flow, args)(args.workspace, args.name, dict_id=args.dictionary,
                                                 on_bad_chunk=args.on_bad_chunk, **_evaluation_params(args))


def _run_nightly(args):
    from atomline.flows import nightly_flow

    with _progress(args.workspace, args.name, ("codes", "features"), args.json, status="nightly run"):
        state = _with_runner(nightly_flow, args)(args.workspace, args.name, return_state=True,
                                                 batches_per_worker=args.batches_per_worker,
                                                 **_nightly_params(args))
    report = state.result(raise_on_failure=False)
    if isinstance(report, BaseException):
        # A run that failed on an error holds the exception as its result, not a report
        # (a Failed run for a regression holds its report): raise it, to be reported once.
        raise report
    report["state"] = {"type": state.type.value, "name": state.name, "message": state.message}
    return report


def serve_deployment(args: argparse.Namespace):
    """The deployment ``atomline serve`` serves: the nightly flow, a cron schedule, parameters."""
    from prefect.schedules import Cron

    from atomline.flows import nightly_flow

    params = dict(_nightly_params(args), workspace=args.workspace, records=args.name)
    params = {k: list(v) if isinstance(v, tuple) else v for k, v in params.items()}
    return nightly_flow.to_deployment(
        name=args.deployment or f"atomline-nightly-{args.name}",
        schedule=Cron(args.cron, timezone=args.timezone),
        parameters=params,
        description=f"atomline nightly flow over data/{args.name} of {args.workspace}",
        tags=["atomline"],
    )


def _run_serve(args):
    deployment = serve_deployment(args)
    info = {"deployment": deployment.name, "flow": deployment.flow_name,
            "schedules": [{"cron": s.schedule.cron, "timezone": s.schedule.timezone}
                          for s in deployment.schedules or []],
            "parameters": deployment.parameters, "served": not args.dry_run}
    if not args.dry_run:
        from prefect import serve

        print(_describe_serve(info), file=sys.stderr)
        _until_interrupted(serve, deployment)  # blocks: runs the flow on schedule
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
    from atomline.stages.workspace import Workspace

    ws = Workspace.open(args.workspace)
    decided = {d["candidate_run"]: d for d in ws.decisions() if d.get("candidate_run")}
    rows = []
    for e in ws.evaluations():
        if args.name and e["records"] != args.name:
            continue
        m = e["metrics"]
        decision = decided.get(e["run_id"], {})
        rows.append({
            "run_id": e["run_id"], "created": e["created"], "records": e["records"], "tag": e.get("tag", ""),
            "dict_id": e["dict_id"], "coder": e.get("coder"), "coder_options": e.get("coder_options"),
            "pooling": e.get("pooling"), "records_fingerprint": e.get("records_fingerprint"),
            "n_rows": e.get("n_rows"), "accuracy": m["features"]["accuracy"],
            "macro_f1": m["features"]["macro_f1"],
            "raw_accuracy": m.get("raw", {}).get("accuracy"),
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
    from atomline.stages.workspace import Workspace

    started = time.perf_counter()
    ws = Workspace.open(args.directory, create=True)
    if "vibration" not in ws.root["data"]:
        records, labels = vibration_records(args.records, seed=args.seed)
        ws.add_records("vibration", records, chunk_rows=250)
        ws.add_labels("vibration", labels)
    with _progress(args.directory, "vibration", ("codes", "features"), args.json, status="demo nightly run"):
        report = _with_runner(nightly_flow, args)(args.directory, "vibration", seed=args.seed,
                                                  workers=args.workers, class_names=list(CLASS_NAMES),
                                                  batches_per_worker=args.batches_per_worker,
                                                  **DEMO_OPTIONS)
    dictionary = ws.load_dictionary(report["candidate_id"])
    report["dictionary"] = {k: dictionary.attrs[k] for k in ("n_atoms", "n_features", "method", "coder",
                                                             "coder_options", "geometry")}
    report["dictionary"]["coherence"] = dictionary.attrs["diagnostics"].get("coherence")
    report["classes"] = list(CLASS_NAMES)
    report["workspace"] = os.path.abspath(args.directory)
    report["seconds"] = time.perf_counter() - started
    return report


# ---------------------------------------------------------------------------- reports
def _describe_records(r: dict) -> str:
    return (f"data/{r['name']}: {r['shape'][0]} records of shape {tuple(r['shape'][1:])}, {r['dtype']}, "
            f"{r['n_chunks']} chunks of {r['chunk_rows']} rows, fingerprint {r['fingerprint']}")


def _describe_stage(r: dict) -> str:
    done = r.get("encoded", r.get("pooled"))
    rate = r.get("records_per_second")
    return (f"{r['output']}: {done} chunks written, {r['skipped']} already done (skipped), "
            f"{r['records']} records" + (f", {rate:,.0f} records/s" if rate else ""))


def _describe_evaluation(r: dict) -> str:
    from atomline.flows.artifacts import score_table

    lines = [f"evaluation {r['run_id']} of dictionary {r['dict_id']} "
             f"({r['n_rows']} labelled rows, {r['folds']}-fold cross-validation)"]
    columns = [("set", "feature set", ""), ("accuracy", "accuracy", ".3f"),
               ("balanced_accuracy", "balanced", ".3f"), ("macro_f1", "macro-F1", ".3f"),
               ("features_minus_set", "features - set", "+.3f"), ("interval_95", "95% interval", "")]
    lines += ["  " + line for line in _table(score_table(r), columns).splitlines()]
    if r.get("pictures"):
        lines.append(f"  pictures: {', '.join(r['pictures'])}")
    return "\n".join(lines)


def _describe_nightly(r: dict) -> str:
    from atomline.flows import OUTCOMES

    state = r.get("state", {})
    lines = [f"nightly outcome: {r['outcome'].upper()} — {OUTCOMES[r['outcome']]}"
             + (f"  [Prefect state {state['type']} '{state['name']}']" if state else ""),
             f"candidate dictionary {r['candidate_id']} (previously promoted: {r['previous_id']})",
             "  " + _describe_stage(r["encode"]), "  " + _describe_stage(r["pool"])]
    if r.get("drift"):
        d = r["drift"]
        lines.append(f"  drift: reconstruction error {100 * d['error_change']:+.1f}%, nonzeros "
                     f"{100 * d['nonzeros_change']:+.1f}% (threshold {100 * d['threshold']:.0f}%)")
    if r.get("candidate"):
        lines.append(_describe_evaluation(r["candidate"]))
    if r.get("gate"):
        g = r["gate"]
        lines.append(f"  gate on {r['metric']}: candidate {g['a']:.3f} vs promoted {g['b']:.3f}, "
                     f"difference {g['difference']:+.3f}, 95% interval [{g['low']:+.3f}, {g['high']:+.3f}], "
                     f"tolerance {r['tolerance']}")
    lines.append(f"promoted dictionary now: {r['promoted_id']}")
    if r.get("already_decided"):
        lines.append(f"these inputs were decided already ({r['already_decided']}): "
                     "that decision is reported, nothing was evaluated or decided again")
    return "\n".join(lines)


def _describe_demo(r: dict) -> str:
    d, cand, enc = r["dictionary"], r["candidate"], r["encode"]
    patches = enc["records"] * _patches_per_record(d["geometry"])
    rate = enc.get("records_per_second")
    gain = 100 * (cand["features"]["accuracy"] - cand["raw"]["accuracy"])
    return "\n".join([
        "atomline demo — synthetic vibration records (invented data; see the README)",
        f"  dictionary   {r['candidate_id']}: {d['n_atoms']} atoms of {d['n_features']} samples, "
        f"learner {d['method']}, coder {d['coder']} {d['coder_options']}, coherence {d['coherence']:.3f}",
        f"  encoded      {enc['records']} records ({patches:,} patches) in {enc['seconds']:.1f} s"
        + (f" — {rate:,.0f} records/s" if rate else "") + f"; {enc['skipped']} chunks already done",
        f"  classes      {', '.join(r['classes'])}",
        f"  accuracy     raw samples {cand['raw']['accuracy']:.3f}  |  sparse features "
        f"{cand['features']['accuracy']:.3f}  ({gain:+.1f} points, {cand['n_rows']} records, "
        f"{cand['folds']}-fold)",
        f"  outcome      {r['outcome']}; promoted dictionary: {r['promoted_id']}",
        f"  outputs      {r['workspace']}  (atomline show {r['workspace']})",
        f"  total time   {r['seconds']:.1f} s",
        "  This is a screening aid for data work, not a maintenance or safety decision.",
    ])


def _patches_per_record(geometry: dict) -> int:
    n = 1
    for extent, size, stride in zip(geometry["record_shape"], geometry["size"], geometry["stride"]):
        n *= (extent - size) // stride + 1
    return n


def _describe_show(r: dict) -> str:
    lines = [f"workspace {r['url']} (layout {r['layout']}); promoted dictionary: {r['promoted']}"]
    for name, info in r["records"].items():
        lines.append(f"  data/{name}: {info['shape']} {info['dtype']}, {info['n_chunks']} chunks"
                     + (", labelled" if info["labelled"] else ""))
    for dict_id, info in r["dictionaries"].items():
        lines.append(f"  dictionaries/{dict_id}: {info['n_atoms']} atoms, {info['method']}, {info['created']}")
    for path, info in r["outputs"].items():
        lines.append(f"  {path}: {info['chunks_done']}/{info['n_chunks']} chunks done")
    lines.append(f"  evaluations: {r['evaluations']}, gate decisions: {r.get('decisions', 0)}")
    latest = r.get("latest_evaluation")
    if latest:
        scores = ", ".join(f"{k} {v:.3f}" for k, v in latest["metrics"].items() if v is not None)
        lines.append(f"  latest evaluation {latest['run_id']} of {latest['dict_id']}: accuracy {scores}")
    pictures = r.get("pictures", [])
    if pictures:
        lines.append(f"  pictures ({len(pictures)}; export with atomline plots {r['url']} --export DIR):")
        lines += [f"    {p['path']}  {p.get('title', '')}" for p in pictures]
    return "\n".join(lines)


def _table(rows: list[dict], columns: list[tuple[str, str, str]]) -> str:
    """Fixed-width text table; columns are (key, heading, format)."""
    cells = [[h for _, h, _ in columns]]
    for row in rows:
        cells.append(["-" if row.get(k) is None else format(row[k], f) for k, _, f in columns])
    widths = [max(len(c[i]) for c in cells) for i in range(len(columns))]
    text = ["  ".join(c.ljust(w) for c, w in zip(line, widths)).rstrip() for line in cells]
    text.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(text)


def _describe_history(r: dict) -> str:
    if not r["evaluations"]:
        return f"no evaluations in {r['workspace']} yet"
    columns = [("created", "created", ""), ("records", "records", ""), ("tag", "tag", ""),
               ("dict_id", "dictionary", ""), ("coder", "coder", ""), ("n_rows", "rows", "d"),
               ("accuracy", "accuracy", ".3f"), ("macro_f1", "macro-F1", ".3f"),
               ("raw_accuracy", "raw", ".3f"), ("outcome", "gate", "")]
    return _table(r["evaluations"], columns) + f"\npromoted dictionary: {r['promoted']}"


def _describe_plots(r: dict) -> str:
    if not r["pictures"]:
        return f"no pictures in {r['workspace']} yet (the evaluate and nightly flows render them)"
    lines = [f"{p['path']}  {p.get('title', '')}  {p['bytes']:,} bytes"
             + (f"  -> {p['file']}" if "file" in p else "") for p in r["pictures"]]
    return "\n".join(lines)


def _describe_serve(r: dict) -> str:
    when = ", ".join(f"{s['cron']} ({s['timezone']})" for s in r["schedules"])
    verb = "serving" if r["served"] else "would serve (dry run)"
    return (f"{verb} deployment {r['deployment']} of flow {r['flow']} on schedule {when}; "
            f"workspace {r['parameters']['workspace']}, records {r['parameters']['records']}")


# ---------------------------------------------------------------------------- progress
class _progress:
    """Show chunk progress by reading the outputs' done flags while a flow runs.

    Progress comes from the workspace itself, so it is right whatever the runner (threads,
    processes, a Dask cluster) and whichever process writes the chunks.
    """

    def __init__(self, url: str, records: str, kinds: tuple[str, ...], silent: bool, status: str = ""):
        self.url, self.records, self.kinds, self.silent = url, records, kinds, silent
        self.status = status  # a spinner line with elapsed time, for steps without chunks
        self._stop = threading.Event()

    def __enter__(self):
        if self.silent or not sys.stderr.isatty():
            return self
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

        self._bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                             TimeElapsedColumn(), transient=False)
        self._bar.start()
        self._tasks: dict[str, int] = {}
        if self.status:
            self._bar.add_task(self.status, total=None)  # indeterminate: a pulsing bar
        self._thread = threading.Thread(target=self._poll, daemon=True)
        self._thread.start()
        return self

    def _poll(self) -> None:
        from atomline.stages.workspace import Workspace

        while not self._stop.wait(1.0):
            try:
                ws = Workspace.open(self.url)
                for kind in self.kinds:
                    for dict_id in ws.root[kind].group_keys():
                        path = f"{kind}/{dict_id}/{self.records}"
                        if not ws.has_output(path):
                            continue
                        flags = ws.output(path).done_flags()
                        if path not in self._tasks:
                            label = "encoding" if kind == "codes" else "pooling"
                            self._tasks[path] = self._bar.add_task(f"{label} {dict_id}", total=flags.size)
                        self._bar.update(self._tasks[path], completed=int(flags.sum()))
            except Exception:  # progress display must never break the run it watches
                continue

    def __exit__(self, *exc):
        if hasattr(self, "_bar"):
            self._stop.set()
            self._thread.join()
            self._bar.stop()
        return False


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
