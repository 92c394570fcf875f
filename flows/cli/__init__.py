"""The ``atomline`` command.

Every command takes the workspace as a directory or fsspec URL, prints a short human
report, or JSON with ``--json``. Flows run locally through Prefect; with no Prefect server
configured (``PREFECT_API_URL``), a flow command starts a temporary one for the run and stops
it afterwards (see ``flows/_server.py``). Arguments are checked against the workspace first
(``flows/preflight.py``), so a mistake is refused before any server starts.

The package: this module holds ``main`` (exit statuses, error reports, Prefect's quiet
defaults); ``parser.py`` the arguments, ``commands.py`` what each command checks and runs,
``reports.py`` the text reports, ``progress.py`` the chunk progress shown while a flow runs.

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
import time
import warnings
from typing import Any

# Neither module imports Prefect at import time: ``main`` sets Prefect's settings first.
from .commands import serve_deployment
from .parser import _parser

__all__ = ["main", "serve_deployment"]


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
