"""Write leases on workspace outputs; private to :mod:`atomline.stages.workspace`.

A lease is one small JSON object in the workspace's own store, at
``.leases/<output path>.json`` (a hidden prefix Zarr does not treat as a node)::

    {"output": "codes/d-1/vib", "host": "node-3", "pid": 4121, "run": "nightly-owl",
     "token": "9f…", "started": 1767225600.0, "heartbeat": 1767225630.0, "ttl": 120.0,
     "pid_start": 81234567}

``pid_start`` is when the holder process started (clock ticks since boot, field 22 of
``/proc/<pid>/stat``; ``null`` where there is no ``/proc``), so a lease whose PID was
reused by a later process on the same host counts as dead.

Taking a lease is a create-if-absent write followed by a read-back of the token:

* local directories: zarr's ``LocalStore.set_if_not_exists`` (an exclusive file create,
  atomic on POSIX file systems);
* fsspec stores (``s3://``, ``memory://`` …): ``pipe_file(mode="create")``, which s3fs
  turns into a conditional ``PUT`` (``If-None-Match: *``, atomic on AWS S3 and stores
  that honour it); other file systems fall back to check-then-write;
* zarr's in-process ``MemoryStore``: an atomic ``dict.setdefault``.

Limits, stated plainly: where the store has no create-if-absent, two runs starting in
the same instant may both write; the read-back of the token then lets the one whose
object survived proceed and refuses the other, unless the two writes and reads
interleave exactly. Breaking an expired lease is a read, compare, delete and create;
Zarr stores offer no compare-and-delete, so two runs breaking the same dead lease at
the same moment could both believe they won (the create that follows is still
exclusive where the store supports it). Expiry compares wall clocks of different hosts:
keep clocks in sync (NTP) and the TTL well above their skew.

A holder keeps its lease alive with a heartbeat thread (every ``ttl / 4`` seconds). A
lease expires when its heartbeat is older than its TTL, or at once when its holder ran
on this host and its process is gone (a killed run on a laptop need not wait out the
TTL). An expired lease is broken by the next run; a live one only by an explicit break.

A holder checks that the lease is still its own (same token in the store, heartbeat
within the TTL) immediately before every chunk it commits (:func:`check_held`) and
raises :class:`~atomline.stages.errors.LeaseLost` otherwise: a run paused past its TTL
(a suspended laptop, a stopped container) whose lease was taken by another run commits
nothing more. Its own expired lease counts as lost even when nobody took it yet, since
another run may be breaking it at that moment. The heartbeat never renews a lease that
is no longer its own, nor one that has expired.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import socket
import threading
import time
import uuid
from dataclasses import asdict, dataclass

from . import _zarr
from .layout import _check_name, _check_output_path
from .safety import ContainedLocalStore

from ..errors import InputError, LeaseHeld, LeaseLost, not_writable, problem, unwritable

PREFIX = ".leases"


@dataclass(frozen=True)
class LeaseInfo:
    """Who holds a lease. Times are seconds since the epoch (UTC)."""

    output: str
    host: str
    pid: int
    run: str
    token: str
    started: float
    heartbeat: float
    ttl: float
    pid_start: int | None = None

    def expired(self, now: float | None = None) -> bool:
        """Whether the heartbeat is older than the TTL, or the holder process is gone."""
        now = time.time() if now is None else now
        if now - self.heartbeat > self.ttl:
            return True
        return self.host == socket.gethostname() and not _pid_alive(self.pid, self.pid_start)

    def describe(self) -> str:
        """One line naming the holder and when it started."""
        started = _dt.datetime.fromtimestamp(self.started, _dt.timezone.utc).isoformat(timespec="seconds")
        age = max(0.0, time.time() - self.heartbeat)
        return (f"run {self.run!r} (host {self.host}, pid {self.pid}), started {started}, "
                f"last heartbeat {age:.0f} s ago, TTL {self.ttl:.0f} s")

    def to_json(self) -> dict:
        return asdict(self)


def _pid_alive(pid: int, started: int | None = None) -> bool:
    """Whether process ``pid`` exists and, when ``started`` is known, is the same process."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        pass
    now_started = process_start(pid)
    return started is None or now_started is None or now_started == started


def process_start(pid: int) -> int | None:
    """Start time of process ``pid`` in clock ticks since boot, or None where unknown.

    Field 22 of ``/proc/<pid>/stat``; the command name (field 2) is in parentheses and may
    itself hold spaces or parentheses, so fields are counted after its last ``)``.
    """
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            text = fh.read().decode("ascii", "replace")
    except OSError:
        return None
    fields = text[text.rfind(")") + 2:].split()
    try:
        return int(fields[19])  # fields after the name start at field 3
    except (IndexError, ValueError):
        return None


def _key(root_path: str, output: str) -> str:
    return "/".join(p for p in (root_path, PREFIX, f"{output}.json") if p)


class _LeaseStore:
    """Create-if-absent, read, overwrite and delete of lease objects in a zarr store."""

    def __init__(self, store, root_path: str):
        self.store = store
        self.root_path = root_path

    def read(self, output: str) -> LeaseInfo | None:
        data = _zarr.read_key(self.store, _key(self.root_path, output))
        if data is None:
            return None
        try:
            return LeaseInfo(**json.loads(data))
        except (ValueError, TypeError):
            # An unreadable lease object (torn write, foreign content): treat as expired.
            return LeaseInfo(output, "?", -1, "unreadable lease", "", 0.0, 0.0, 0.0)

    def create(self, info: LeaseInfo) -> bool:
        """Write ``info`` only if no lease exists; True when ours is the one stored after."""
        key = _key(self.root_path, info.output)
        data = json.dumps(info.to_json()).encode()
        fs = getattr(self.store, "fs", None)
        try:
            if fs is not None and hasattr(fs, "_pipe_file"):  # fsspec store: conditional PUT
                _zarr.run(fs._pipe_file(f"{self.store.path.rstrip('/')}/{key}", data, mode="create"))
            else:
                _zarr.run(self.store.set_if_not_exists(key, _zarr.to_buffer(data)))
        except OSError as exc:  # FileExistsError, or a store's "precondition failed" ...
            if unwritable(exc):  # ... but never a read-only or protected store
                raise not_writable(f"lease on {info.output}", exc) from exc
        held = self.read(info.output)
        return held is not None and held.token == info.token

    def overwrite(self, info: LeaseInfo) -> None:
        _zarr.run(self.store.set(_key(self.root_path, info.output), _zarr.to_buffer(json.dumps(info.to_json()).encode())))

    def delete(self, output: str) -> None:
        _zarr.run(self.store.delete(_key(self.root_path, output)))




class Lease:
    """A held write lease; a context manager that releases it on exit.

    Do not build one directly: use :meth:`atomline.stages.workspace.Workspace.lease`.

    Attributes
    ----------
    info : LeaseInfo
        What is written in the store.
    lost : bool
        True once the heartbeat found the lease broken or taken by another run.
    """

    def __init__(self, store: _LeaseStore, info: LeaseInfo, registry: set):
        self._store, self.info, self._registry = store, info, registry
        self.lost = False
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._beat, name=f"lease {info.output}", daemon=True)
        self._registry.add(info.token)
        self._thread.start()

    def _beat(self) -> None:
        while not self._stop.wait(self.info.ttl / 4):
            self.renew()

    def renew(self) -> bool:
        """Refresh the heartbeat; False (and ``lost``) once the lease is no longer ours.

        Not ours: another token (or none) is stored, or our own last heartbeat is older
        than the TTL (another run may be breaking it right now). A lost lease is never
        written again, so the run that took it keeps it.
        """
        held = self._store.read(self.info.output)
        if (held is None or held.token != self.info.token
                or time.time() - self.info.heartbeat > self.info.ttl):
            self._lose()
            return False
        self.info = LeaseInfo(**{**self.info.to_json(), "heartbeat": time.time()})
        self._store.overwrite(self.info)
        return True

    def check(self) -> None:
        """Raise :class:`LeaseLost` unless the lease is still ours (see :func:`check_held`).

        For writers in this process that commit other things than output chunks
        (a dictionary, its checkpoints).
        """
        check_held(self._store, self.info.output, self.info.token, self._registry)

    def _lose(self) -> None:
        self.lost = True
        self._stop.set()
        self._registry.discard(self.info.token)

    def release(self) -> None:
        """Stop the heartbeat and delete the lease if it is still ours."""
        self._stop.set()
        if self._thread is not threading.current_thread():
            self._thread.join()
        self._registry.discard(self.info.token)
        held = self._store.read(self.info.output)
        if held is not None and held.token == self.info.token:
            self._store.delete(self.info.output)

    def __enter__(self) -> "Lease":
        return self

    def __exit__(self, *exc) -> None:
        self.release()


def acquire(store: _LeaseStore, output: str, *, run: str, ttl: float, break_existing: bool,
            registry: set) -> Lease:
    """Take the lease of ``output`` or raise :class:`LeaseHeld` naming the holder."""
    now = time.time()
    info = LeaseInfo(output, socket.gethostname(), os.getpid(), run, uuid.uuid4().hex, now, now, float(ttl),
                     process_start(os.getpid()))
    for _ in range(3):  # a broken lease may be re-taken by a third run in between
        if store.create(info):
            return Lease(store, info, registry)
        held = store.read(output)
        if held is None:
            continue  # released in between
        if not (break_existing or held.expired()):
            raise LeaseHeld(problem(
                f"lease on {output}", "no other run writing this output",
                f"it is held by {held.describe()}",
                "Wait for that run to finish; if it is dead, its lease expires after the TTL, "
                "or break it with break_lease=True (--break-lease). Finished chunks are kept."))
        store.delete(output)
    raise LeaseHeld(problem(f"lease on {output}", "to take the lease", "other runs taking it in turn",
                            "Try again in a moment."))


def check_not_leased(store: _LeaseStore, output: str, registry: set) -> None:
    """Refuse a write to ``output`` while another live run holds its lease."""
    held = store.read(output)
    if held is not None and held.token not in registry and not held.expired():
        raise LeaseHeld(problem(output, "no other run writing this output",
                                f"a lease held by {held.describe()}",
                                "Wait for that run, or break its lease (--break-lease) if it is dead."))


def check_held(store: _LeaseStore, output: str, token: str, registry: set) -> None:
    """Refuse to commit to ``output`` unless the lease with ``token`` is still the writer's.

    Called immediately before every chunk commit by a run holding a lease (one read of
    the lease object). ``token`` is the holder's; in another process (process and Dask
    workers) only the store tells whether it still holds.

    Raises
    ------
    LeaseLost
        The lease is gone, held by another run, or has expired (its last heartbeat is
        older than its TTL).
    """
    held = store.read(output)
    if held is not None and held.token == token and time.time() - held.heartbeat <= held.ttl:
        return
    registry.discard(token)
    if held is None:
        found = "no lease at all (it was broken)"
    elif held.token != token:
        found = f"it is now held by {held.describe()}"
    else:
        found = f"its last heartbeat {time.time() - held.heartbeat:.0f} s ago, past the TTL of {held.ttl:.0f} s"
    raise LeaseLost(problem(
        f"lease on {output}", "the write lease this run took, still its own", found,
        "This run was paused or cut off too long and stopped writing: nothing more was "
        "committed after the lease was lost, and finished chunks are kept. Let the run "
        "holding it finish, or rerun to resume; raise the TTL if runs pause this long."))


# ---------------------------------------------------------------- the workspace's side
#: Tokens of the leases this process holds (a holder may write its own outputs).
_HELD_LEASES: set[str] = set()


class LeasesMixin:
    """Write leases of a workspace's outputs, kept beside it under ``.leases/``."""

    def lease(self, output: str, *, run: str | None = None, ttl: float = 120.0,
              break_existing: bool = False) -> Lease:
        """Take the write lease of an output; use it as a context manager.

        One run at a time may write an output (``codes/…``, ``features/…``,
        ``dictionaries/<id>``, or ``promoted`` for the pointer). While held, a heartbeat
        thread renews it every ``ttl / 4`` seconds; it is released on exit.

        Parameters
        ----------
        output : str
            Workspace path of the output.
        run : str, optional
            Name of the run, shown to anyone refused (default: this process).
        ttl : float
            Seconds without a heartbeat after which the lease counts as abandoned.
        break_existing : bool
            Take the lease even from a live holder (when you know it is dead).

        Returns
        -------
        Lease
            ``with ws.lease("codes/d-1/vib", run="nightly"): ...``

        Raises
        ------
        LeaseHeld
            A live run holds it; the message names its host, pid, run and start time.

        Notes
        -----
        Expired leases (heartbeat older than the TTL, or a holder process on this host
        that is gone) are broken silently; finished chunks are never touched by a
        break. See :mod:`atomline.stages.workspace.leases` for what each kind of store guarantees.
        """
        if not (isinstance(ttl, (int, float)) and ttl > 0):
            raise InputError(problem("lease ttl", "a positive number of seconds", repr(ttl), "Pass ttl > 0."))
        lease = acquire(self._lease_store(), self._lease_name(output),
                                run=run or f"pid {os.getpid()}", ttl=float(ttl),
                                break_existing=break_existing, registry=_HELD_LEASES)
        store = self.root.store
        if isinstance(store, ContainedLocalStore):
            # The one writer now: what a killed writer left half-written here is abandoned.
            # ("promoted" is the root's own metadata: sweep only the root's files.)
            prefix = "" if output == "promoted" else f"{self.root.store_path.path}/{output}".strip("/")
            if prefix == "" or os.path.isdir(store.root / prefix):
                store.sweep_unfinished_writes(prefix)
        return lease

    def lease_holder(self, output: str) -> dict | None:
        """Who holds the lease of ``output`` (host, pid, run, started, heartbeat, ttl), or None."""
        held = self._lease_store().read(self._lease_name(output))
        return None if held is None else dict(held.to_json(), expired=held.expired())

    def break_lease(self, output: str) -> dict | None:
        """Remove the lease of ``output`` whoever holds it; returns what was removed.

        Only the lease object is deleted: chunks already marked done stay done, and the
        next run resumes from them.
        """
        holder = self.lease_holder(output)
        if holder is not None:
            self._lease_store().delete(self._lease_name(output))
        return holder

    def _lease_name(self, output: str) -> str:
        if output in ("promoted", "evaluations", "decisions", "trials", "recipes"):
            return output
        parts = output.split("/") if isinstance(output, str) else []
        if len(parts) == 2 and parts[0] == "dictionaries":
            _check_name(parts[1], "dictionary id")
            return output
        return _check_output_path(output)

    def _lease_store(self) -> _LeaseStore:
        return _LeaseStore(self.root.store, self.root.store_path.path)

    def _refuse_leased(self, path: str) -> None:
        check_not_leased(self._lease_store(), path, _HELD_LEASES)

