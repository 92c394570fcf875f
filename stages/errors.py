"""The one exception family of atomline.

Every error the package raises on purpose derives from :class:`AtomlineError`, so a
pipeline can catch the whole family with one ``except``. Messages follow one shape,
built by :func:`problem`: what was looked at (array, chunk or row), what was expected,
what was found, and what to do about it.

The subclasses also derive from the matching built-in exception (``ValueError``,
``FileExistsError``, ...) so code written against the standard library keeps working.
"""

from __future__ import annotations

import errno

__all__ = [
    "AtomlineError",
    "InputError",
    "LayoutError",
    "FingerprintMismatch",
    "OutputExists",
    "NotFound",
    "BadChunk",
    "LeaseHeld",
    "LeaseLost",
    "NotWritable",
    "UnsafeStore",
    "StoreFault",
    "PrefectUnavailable",
    "problem",
    "worth_retrying",
    "unwritable",
    "not_writable",
    "retry_if_transient",
]


def problem(where: str, expected: str, found: str, fix: str) -> str:
    """Build the one message shape used across the package.

    Parameters
    ----------
    where : str
        The object concerned, e.g. ``"data/vibration, chunk 3"``.
    expected : str
        What the code needed.
    found : str
        What it got instead.
    fix : str
        What the user can do.

    Returns
    -------
    str
        ``"<where>: expected <expected>, found <found>. <fix>"``
    """
    return f"{where}: expected {expected}, found {found}. {fix}"


class AtomlineError(Exception):
    """Base of every error atomline raises on purpose."""


class InputError(AtomlineError, ValueError):
    """Input data or parameters that cannot be used (shape, dtype, values)."""


class LayoutError(AtomlineError, ValueError):
    """A store that is not an atomline workspace, or one of an unknown layout version."""


class FingerprintMismatch(AtomlineError, ValueError):
    """Outputs made from different inputs would be mixed."""


class OutputExists(AtomlineError, FileExistsError):
    """A finished output would be overwritten without being told to."""


class NotFound(AtomlineError, KeyError):
    """A named array, dictionary or evaluation is not in the workspace."""

    def __str__(self) -> str:  # KeyError quotes its message; keep it readable
        return str(self.args[0]) if self.args else ""


class BadChunk(InputError):
    """An input chunk that is missing, cannot be decoded, or holds NaN/Inf."""


class LeaseHeld(AtomlineError, RuntimeError):
    """Another run holds the write lease of an output."""


class LeaseLost(AtomlineError, RuntimeError):
    """A run's write lease expired or was taken by another run while it was writing."""


class NotWritable(AtomlineError, PermissionError):
    """The workspace cannot be written (read-only file system or mount, no permission)."""


class UnsafeStore(LayoutError):
    """A store whose arrays could run code when read (object dtypes, pickling codecs)."""


class StoreFault(AtomlineError, OSError):
    """The store failed while a chunk was being written (full disk, refused write)."""


def worth_retrying(exc: BaseException | None) -> bool:
    """Whether a failed attempt could succeed when simply run again.

    atomline's own errors are deterministic (the same input gives the same refusal), so
    retrying them only repeats the failure and its log; the exception is
    :class:`StoreFault`, a store that failed while writing (a dropped connection, a
    throttled request). Anything else (a lost worker, a network error) may be transient.
    """
    return isinstance(exc, StoreFault) or not isinstance(exc, AtomlineError)


def retry_if_transient(task, task_run, state) -> bool:
    """Prefect ``retry_condition_fn``: retry a failed task run only if :func:`worth_retrying`."""
    exc = state.data if isinstance(state.data, BaseException) else None
    if exc is None:
        try:
            state.result(raise_on_failure=True)
        except BaseException as raised:  # the failure's own exception, as Prefect stored it
            exc = raised
    return worth_retrying(exc)


def unwritable(exc: BaseException) -> bool:
    """Whether an ``OSError`` means the place cannot be written at all (a read-only file
    system or mount, no permission), as opposed to a file that is there or a full disk."""
    return isinstance(exc, PermissionError) or getattr(exc, "errno", None) in (
        errno.EROFS, errno.EACCES, errno.EPERM)


def not_writable(where: str, exc: BaseException) -> NotWritable:
    """The :class:`NotWritable` error for ``exc`` raised while writing ``where``."""
    return NotWritable(problem(where, "a workspace this run can write",
                               f"a read-only or protected store ({type(exc).__name__}: {exc})",
                               "Run on a writable copy of the workspace, or fix the mount or "
                               "the permissions; reading commands (show, plots) work on a read-only one."))


class PrefectUnavailable(AtomlineError, RuntimeError):
    """No Prefect API to run a flow against: the temporary server did not start in time."""
