"""The temporary Prefect server a flow command runs against when none is configured.

With ``PREFECT_API_URL`` set, the command uses that server and starts nothing. Otherwise
:func:`temporary_server` starts ``prefect server start`` on a free loopback port for the
length of the command, waits for its health endpoint (``ATOMLINE_PREFECT_START_TIMEOUT``
seconds, default 300: the first start on a machine creates Prefect's database, and a busy
laptop is slow), points ``PREFECT_API_URL`` at it, and stops it afterwards.

The server runs in its own process group, so stopping the group stops everything it
started. On Linux the kernel also kills it when the command dies (``PR_SET_PDEATHSIG``):
a command killed with SIGKILL, which runs no clean-up of its own, leaves no server behind.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from collections.abc import Iterator

from atomline.stages.errors import InputError, PrefectUnavailable, problem

__all__ = ["temporary_server", "start_timeout", "START_TIMEOUT_ENV", "DEFAULT_START_TIMEOUT"]

#: Environment variable holding the seconds to wait for the temporary server.
START_TIMEOUT_ENV = "ATOMLINE_PREFECT_START_TIMEOUT"
#: Seconds to wait by default (a first start on a busy two-core laptop took over 4 minutes).
DEFAULT_START_TIMEOUT = 300.0
#: Lines of the server's own output quoted when it does not come up.
_TAIL_LINES = 5
#: From <linux/prctl.h>.
_PR_SET_PDEATHSIG = 1


def start_timeout() -> float:
    """Seconds to wait for the temporary server, from ``ATOMLINE_PREFECT_START_TIMEOUT``."""
    text = os.environ.get(START_TIMEOUT_ENV, "").strip()
    if not text:
        return DEFAULT_START_TIMEOUT
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if value < 0:
        raise InputError(problem(START_TIMEOUT_ENV, "a number of seconds ≥ 0", repr(text),
                                 f"Set it to e.g. 600, or unset it for {DEFAULT_START_TIMEOUT:.0f}."))
    return value


@contextlib.contextmanager
def temporary_server() -> Iterator[str]:
    """Make a Prefect API available for the body; yield its URL.

    Uses ``PREFECT_API_URL`` when set (environment or Prefect profile); otherwise starts a
    temporary server (see the module docstring) and stops it, with everything it started,
    when the body ends.

    Raises
    ------
    PrefectUnavailable
        The server did not answer its health check in time, or exited.
    """
    from prefect.settings import PREFECT_API_URL

    configured = PREFECT_API_URL.value()  # from the environment or the active Prefect profile
    if configured:
        _check_answers(configured)
        yield configured
        return
    timeout = start_timeout()
    port = _free_port()
    url = f"http://127.0.0.1:{port}/api"
    print(f"atomline: starting a temporary Prefect server for this command on 127.0.0.1:{port} "
          f"(the first start on a machine can take a minute or more; set PREFECT_API_URL to use "
          f"a running server instead)", file=sys.stderr, flush=True)
    with tempfile.TemporaryFile() as log:
        process = _spawn(port, log)
        try:
            _wait_healthy(url, process, timeout, log)
            with _api_url(url):
                try:
                    yield url
                finally:
                    _send_pending(url)
        finally:
            _stop(process)


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _spawn(port: int, log) -> subprocess.Popen:
    env = dict(os.environ, PREFECT_SERVER_ANALYTICS_ENABLED="false", PREFECT_SERVER_UI_ENABLED="false")
    env.pop("PREFECT_API_URL", None)
    return subprocess.Popen(
        [sys.executable, "-m", "prefect", "server", "start", "--host", "127.0.0.1", "--port", str(port)],
        stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT, env=env,
        preexec_fn=_detach_and_die_with_parent,
    )


def _detach_and_die_with_parent() -> None:
    """In the child before exec: own process group; on Linux, SIGKILL when the parent dies."""
    os.setpgid(0, 0)
    if sys.platform.startswith("linux"):
        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)


def _wait_healthy(url: str, process: subprocess.Popen, timeout: float, log) -> None:
    deadline = time.monotonic() + timeout
    while True:
        if process.poll() is not None:
            raise _unavailable(url, f"a server that exits with status {process.returncode}", log)
        if _healthy(url):
            return
        if time.monotonic() >= deadline:
            raise _unavailable(url, f"no answer within {timeout:g} s ({START_TIMEOUT_ENV})", log)
        time.sleep(0.5)


def _healthy(url: str) -> bool:
    try:
        with urllib.request.urlopen(f"{url}/health", timeout=5) as response:
            return response.status == 200
    except (urllib.error.URLError, OSError, ValueError):
        return False


def _check_answers(url: str) -> None:
    """Refuse a configured API nothing listens at (any HTTP answer, even an error, will do:
    a hosted API may answer its health path differently)."""
    try:
        urllib.request.urlopen(f"{url.rstrip('/')}/health", timeout=30).close()
    except urllib.error.HTTPError:
        return
    except (urllib.error.URLError, OSError, ValueError) as exc:
        reason = getattr(exc, "reason", exc)
        raise PrefectUnavailable(problem(
            f"the Prefect API at PREFECT_API_URL={url}", "a server answering there",
            f"no answer ({reason})",
            "Start that server (`prefect server start`), correct PREFECT_API_URL, or unset it "
            "so that the command starts a temporary server of its own.")) from None


def _unavailable(url: str, found: str, log) -> PrefectUnavailable:
    """One paragraph: what failed, the server's last output, what to do."""
    log.seek(0)
    lines = [line.strip() for line in log.read().decode(errors="replace").splitlines() if line.strip()]
    tail = " | ".join(lines[-_TAIL_LINES:]) or "nothing"
    return PrefectUnavailable(problem(
        "the temporary Prefect server this command needs",
        f"an answer at {url}/health", f"{found}; its last output: {tail}",
        f"Start a server once with `prefect server start` in another terminal and set "
        f"PREFECT_API_URL=http://127.0.0.1:4200/api, or give the temporary one more time with "
        f"{START_TIMEOUT_ENV}=<seconds> (default {DEFAULT_START_TIMEOUT:.0f})."))


@contextlib.contextmanager
def _api_url(url: str) -> Iterator[None]:
    """Point this process (and the processes it starts) at ``url``, then restore."""
    before = os.environ.get("PREFECT_API_URL")
    os.environ["PREFECT_API_URL"] = url
    try:
        # Prefect reads its settings when first imported; if it already was, override them.
        from prefect.settings import PREFECT_API_URL, temporary_settings

        with temporary_settings(updates={PREFECT_API_URL: url}):
            yield
    finally:
        if before is None:
            os.environ.pop("PREFECT_API_URL", None)
        else:
            os.environ["PREFECT_API_URL"] = before


def _send_pending(url: str) -> None:
    """Send the log lines and events Prefect still holds to the server before it stops.

    Prefect's background workers send them in batches; stopping the server first loses
    them and prints "Error logging to API" when the process exits.
    """
    import inspect

    from prefect.events.worker import EventsWorker
    from prefect.logging.handlers import APILogWorker
    from prefect.utilities.asyncutils import run_coro_as_sync

    async def drain() -> None:
        try:
            pending = APILogWorker.instance().drain()
            if inspect.isawaitable(pending):
                await pending
        except RuntimeError:  # the log worker was never started
            pass
        pending = EventsWorker.drain_all()
        if inspect.isawaitable(pending):
            await pending

    try:
        run_coro_as_sync(drain())
    except Exception:  # sending leftovers must never replace the command's own outcome
        pass


def _stop(process: subprocess.Popen) -> None:
    """Stop the server's whole process group: politely, then for sure."""
    for sig, wait in ((signal.SIGTERM, 15), (signal.SIGKILL, 5)):
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, sig)
        try:
            process.wait(timeout=wait)
            break
        except subprocess.TimeoutExpired:
            continue
    # Anything left in the group after the leader exited (a worker it started).
    with contextlib.suppress(ProcessLookupError):
        os.killpg(process.pid, signal.SIGKILL)
