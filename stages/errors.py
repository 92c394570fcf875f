"""The one exception family of atomline.

Every error the package raises on purpose derives from :class:`AtomlineError`, so a
pipeline can catch the whole family with one ``except``. Messages follow one shape,
built by :func:`problem`: what was looked at (array, chunk or row), what was expected,
what was found, and what to do about it.

The subclasses also derive from the matching built-in exception (``ValueError``,
``FileExistsError``, ...) so code written against the standard library keeps working.
"""

from __future__ import annotations

__all__ = [
    "AtomlineError",
    "InputError",
    "LayoutError",
    "FingerprintMismatch",
    "OutputExists",
    "NotFound",
    "BadChunk",
    "LeaseHeld",
    "UnsafeStore",
    "StoreFault",
    "problem",
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


class UnsafeStore(LayoutError):
    """A store whose arrays could run code when read (object dtypes, pickling codecs)."""


class StoreFault(AtomlineError, OSError):
    """The store failed while a chunk was being written (full disk, refused write)."""
