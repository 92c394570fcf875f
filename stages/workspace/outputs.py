"""Outputs under the chunk protocol (codes and features): data arrays plus one done flag
per row chunk; creating, resuming and growing them."""

from __future__ import annotations

from typing import Callable, Iterator

import numpy as np
import zarr

from . import leases as _leases
from ._zarr import write_together as _write_together
from .layout import _OUTPUT_ATTRS, _check_output_path, _now, _package_version, _plain
from .safety import _check_group_members, _check_safe, require_attrs
from ..errors import AtomlineError, BadChunk, FingerprintMismatch, InputError, LayoutError, StoreFault, problem

_DONE, _SKIPPED = 1, 2  # done-flag values


class Output:
    """A chunked output under the chunk protocol: data arrays plus one done flag per chunk.

    Parameters
    ----------
    group : zarr.Group
        The output's group; holds the data arrays and ``done`` (n_chunks,) uint8.
    path : str, optional
        Its path in the workspace (used in messages).

    Raises
    ------
    UnsafeStore
        An array of the group has an object dtype or a codec that could run code.
    LayoutError
        The attributes are missing or of the wrong types.
    """

    def __init__(self, group: zarr.Group, path: str = "", guard: Callable[[], None] | None = None):
        self.group = group
        self.path = path or group.path
        # Called immediately before every commit or skip: raises when this writer may no
        # longer write (its lease was lost, or another live run holds the output).
        self._guard = guard
        _check_group_members(group, self.path)  # raw metadata, before Zarr parses it
        arrays = dict(group.arrays())
        for name, arr in arrays.items():  # and the parsed form, before any chunk is decoded
            _check_safe(arr, f"{self.path}/{name}")
        if "done" not in arrays:
            raise LayoutError(problem(self.path, "an output with a 'done' array",
                                      "a group without one", "Rebuild the output (overwrite=True)."))
        self._done = arrays.pop("done")
        # The data arrays, opened once: every write and resize goes through these objects
        # (opening one reads its metadata, a store round trip per chunk and array otherwise).
        self._data = dict(sorted(arrays.items()))
        kind = self.path.split("/")[0]
        if kind in _OUTPUT_ATTRS:
            require_attrs(dict(group.attrs), _OUTPUT_ATTRS[kind], self.path)

    @property
    def attrs(self) -> dict:
        """The output's attributes (fingerprints, parameters, geometry)."""
        return dict(self.group.attrs)

    @property
    def n_chunks(self) -> int:
        """Number of row chunks (and of done flags)."""
        return int(self._done.shape[0])

    def _flags(self, first: int = 0, stop: int | None = None) -> np.ndarray:
        """Raw flag values of chunks ``first … stop − 1`` (default all), in one read.

        A flag chunk that cannot be decoded counts as 0 (to do).
        """
        stop = self.n_chunks if stop is None else stop
        try:
            return np.asarray(self._done[first:stop])
        except Exception:  # one torn flag must not make the whole output unreadable
            flags = np.zeros(stop - first, dtype=np.uint8)
            for c in range(first, stop):
                try:
                    flags[c - first] = self._done[c]
                except Exception:
                    flags[c - first] = 0
            return flags

    def done_flags(self) -> np.ndarray:
        """ndarray of shape (n_chunks,), bool: which chunks are finished (or skipped)."""
        return self._flags() > 0

    def done_among(self, chunks: list[int]) -> tuple[set[int], set[int]]:
        """Which of ``chunks`` are finished, and which of those were skipped for bad input.

        One read of the flags for a task's batch (a contiguous run of chunks), instead of
        one store round trip per chunk.

        Returns
        -------
        done : set of int
            Finished chunks (done or skipped).
        skipped : set of int
            The skipped ones among them.
        """
        if not len(chunks):
            return set(), set()
        first = min(chunks)
        flags = self._flags(first, max(chunks) + 1)
        done = {int(c) for c in chunks if flags[c - first] > 0}
        return done, {c for c in done if flags[c - first] == _SKIPPED}

    def check_chunks(self, chunks: list[int]) -> list[int]:
        """Refuse chunk numbers that are not integers ``0 … n_chunks − 1`` (before any work).

        Returns
        -------
        list of int
        """
        bad = [c for c in chunks if isinstance(c, bool) or not isinstance(c, (int, np.integer))
               or not 0 <= c < self.n_chunks]
        if bad:
            raise InputError(problem(f"{self.path}, chunks", f"chunk numbers 0..{self.n_chunks - 1}",
                                     f"{bad[:10]}", "Pass chunk numbers from prepare's 'pending' list."))
        return [int(c) for c in chunks]

    def read(self, name: str, rows: slice) -> np.ndarray:
        """Rows ``rows`` of the data array ``name`` (opened once with the output).

        Raises
        ------
        BadChunk
            A chunk of those rows is missing or cannot be decoded (truncated, torn);
            the message names the array, the chunk and its rows.
        """
        arr = self._data[name]
        try:
            return np.asarray(arr[rows])
        except AtomlineError:
            raise
        except Exception as exc:
            first = rows.start // int(arr.chunks[0])
            last = (min(rows.stop, arr.shape[0]) - 1) // int(arr.chunks[0])
            chunks = f"chunk {first}" if first == last else f"chunks {first}..{last}"
            raise BadChunk(problem(
                f"{self.path}/{name}, {chunks} (rows {rows.start}..{rows.stop - 1})",
                "a chunk that decodes", f"{type(exc).__name__}: {str(exc)[:200]}",
                "Rebuild the output that holds it (rerun its stage with overwrite), or rerun "
                "with on_bad_chunk='skip' (--on-bad-chunk skip) to leave those rows out.")) from exc

    def pending(self) -> list[int]:
        """Chunk numbers still to do, in order."""
        return [int(c) for c in np.flatnonzero(~self.done_flags())]

    def is_done(self, chunk: int) -> bool:
        """Whether chunk ``chunk`` is finished (or was skipped)."""
        try:
            return bool(self._done[chunk])
        except Exception:
            return False

    def is_skipped(self, chunk: int) -> bool:
        """Whether chunk ``chunk`` was skipped because its input was bad."""
        try:
            return int(self._done[chunk]) == _SKIPPED
        except Exception:
            return False

    def skipped_chunks(self) -> list[int]:
        """Chunk numbers that were skipped because their input was bad."""
        return [int(c) for c in np.flatnonzero(self._flags() == _SKIPPED)]

    def commit(self, chunk: int, rows: slice, data: dict[str, np.ndarray]) -> None:
        """Write one chunk's data, then its done flag (the flag is always last).

        Parameters
        ----------
        chunk : int
            Chunk number.
        rows : slice
            Rows of every data array that the chunk owns (whole Zarr chunks).
        data : dict of str to ndarray
            One entry per data array of the output.

        Raises
        ------
        StoreFault
            A write failed (full disk, refused write); the chunk stays marked to do.
        """
        self._write(chunk, rows, data, _DONE)

    def skip(self, chunk: int, rows: slice, reason: str) -> None:
        """Mark a chunk whose input was bad as skipped: fill values, then flag 2.

        The data arrays of the chunk are reset to their fill values first (a crashed
        earlier attempt may have left part of a chunk), so a skipped chunk never holds
        numbers that look real.
        """
        fills = {}
        for name, arr in self._data.items():
            n = len(range(*rows.indices(arr.shape[0])))
            fills[name] = np.full((n, *arr.shape[1:]), arr.fill_value, dtype=arr.dtype)
        self._write(chunk, rows, fills, _SKIPPED)

    def _write(self, chunk: int, rows: slice, data: dict[str, np.ndarray], flag: int) -> None:
        if self._guard is not None:
            self._guard()
        try:
            _write_together([(self._data[name], rows, values) for name, values in data.items()])
            self._done[chunk] = flag
        except AtomlineError:
            raise
        except Exception as exc:
            raise StoreFault(problem(f"{self.path}, chunk {chunk} (rows {rows.start}..{rows.stop - 1})",
                                     "a successful write", f"{type(exc).__name__}: {exc}",
                                     "Free space or fix the store, then rerun: the chunk is "
                                     "not marked done and will be written again.")) from exc

    def record_skips(self, rows_per_chunk: int, n_rows: int) -> dict:
        """Write the ``skipped`` attribute from the flags (call from one process only).

        Parameters
        ----------
        rows_per_chunk : int
            Records per chunk (the unit the rows are reported in).
        n_rows : int
            Records in all.

        Returns
        -------
        dict
            ``{"chunks": [...], "rows": [[start, stop], ...], "n_rows": int}``
        """
        chunks = self.skipped_chunks()
        ranges = [[c * rows_per_chunk, min(n_rows, (c + 1) * rows_per_chunk)] for c in chunks]
        summary = {"chunks": chunks, "rows": ranges, "n_rows": int(sum(b - a for a, b in ranges))}
        if self.group.attrs.get("skipped") != summary:
            self.group.attrs["skipped"] = summary
        return summary

    @property
    def complete(self) -> bool:
        """Whether every chunk is finished (or skipped)."""
        return bool(self.done_flags().all())

    @property
    def n_rows(self) -> int:
        """Rows of the data arrays."""
        return int(next(iter(self._data.values())).shape[0])

    def grow(self, n_rows: int) -> list[int]:
        """Extend the data arrays to ``n_rows`` rows (the records grew).

        The old last chunk, if it was partial, gets rows it did not have, so its done flag
        is cleared first; then the arrays and the flags are extended (new chunks pending).
        Every step can be repeated, so a grow that stops half-way is finished by the next.

        Parameters
        ----------
        n_rows : int
            New row count, at least the current one.

        Returns
        -------
        list of int
            Chunk numbers that became pending.
        """
        chunk_rows = int(next(iter(self._data.values())).chunks[0])
        old = self.n_rows
        if n_rows < old:
            raise FingerprintMismatch(problem(f"output {self.group.path}", f"at most {old} rows to keep",
                                              f"{n_rows} rows", "Outputs only grow; recreate it with overwrite."))
        first = old // chunk_rows
        if old % chunk_rows and first < self.n_chunks:
            self._done[first] = 0
        for a in self._data.values():
            a.resize((n_rows, *a.shape[1:]))
        n_chunks = -(-n_rows // chunk_rows)
        self._done.resize((n_chunks,))
        return [first + int(c) for c in np.flatnonzero(~self.done_flags()[first:])]




class OutputsMixin:
    """``codes/…`` and ``features/…``: create, reopen and list outputs."""

    def create_output(self, path: str, *, n_rows: int, chunk_rows: int,
                      arrays: dict[str, tuple[tuple[int, ...], str]], attrs: dict,
                      overwrite: bool = False, covers: dict | None = None) -> Output:
        """Create (or reopen for resuming, or grow) a chunked output.

        An output that exists with the same ``attrs["fingerprint"]`` is reopened so a rerun
        resumes it; one with another fingerprint is refused unless ``overwrite``.

        With ``covers``, the output is made from records that may grow: its fingerprint
        leaves their content out, and ``attrs["covers"]`` names the records' length and
        fingerprint it was made from. Reopened for records that have grown since — the
        covered length and fingerprint are in the records' history — it grows to
        ``n_rows`` (:meth:`Output.grow`); made from records that were replaced, it is
        refused unless ``overwrite``.

        Parameters
        ----------
        path : str
            Group path, e.g. ``codes/<dict-id>/<name>``.
        n_rows : int
            Rows of every data array.
        chunk_rows : int
            Rows per chunk (one done flag each).
        arrays : dict of str to (tail shape, dtype)
            Data arrays: each has shape ``(n_rows, *tail)``.
        attrs : dict
            Plain JSON; must contain ``fingerprint``.
        overwrite : bool
            Replace an existing output made from other inputs, or a finished one.
        covers : dict, optional
            ``{"records": name, "rows": int, "fingerprint": str}``: the records (current
            length and fingerprint) the output is made from.

        Returns
        -------
        Output
        """
        _check_output_path(path)
        if covers is not None:
            attrs = dict(attrs, covers=dict(covers))
        if not (isinstance(attrs, dict) and isinstance(attrs.get("fingerprint"), str)):
            raise InputError(problem(f"{path}, attrs", "a dict with a 'fingerprint' string",
                                     repr(attrs)[:200], "Pass the output's fingerprint."))
        if not (n_rows >= 1 and chunk_rows >= 1):
            raise InputError(problem(path, "at least one row and one row per chunk",
                                     f"n_rows={n_rows}, chunk_rows={chunk_rows}", "Add records first."))
        self._refuse_leased(path)
        if self.has_output(path):
            old = self.output(path)
            same = old.attrs.get("fingerprint") == attrs["fingerprint"]
            if same and not overwrite and covers is not None:
                same = self._extend_cover(old, covers, n_rows)
            if same and not overwrite:
                return old
            if not overwrite:
                raise FingerprintMismatch(problem(
                    path, f"an output made from the same inputs (fingerprint {attrs['fingerprint']})",
                    f"one made from other inputs (fingerprint {old.attrs.get('fingerprint')})",
                    "Pass overwrite=True (--overwrite) to replace it, or write elsewhere."))
        # Attributes first, the done array last: a crash part-way leaves a group with no
        # done array, which has_output does not count and the next run recreates.
        g = self.root.create_group(path, overwrite=True, attributes=_plain(
            dict(attrs, created=_now(), version=_package_version())))
        for name, (tail, dtype) in arrays.items():
            fill = -1 if name == "index" else 0
            g.create_array(name, shape=(n_rows, *tail), chunks=(chunk_rows, *tail),
                           dtype=dtype, fill_value=fill)
        n_chunks = -(-n_rows // chunk_rows)
        g.create_array("done", shape=(n_chunks,), chunks=(1,), dtype="u1", fill_value=0)
        return Output(g, path)

    def _extend_cover(self, out: Output, covers: dict, n_rows: int) -> bool:
        """Grow ``out`` when the records it covers are a prefix of ``covers``.

        Returns whether ``out`` now covers ``covers`` (False: made from other records).
        """
        had = out.attrs.get("covers") or {}
        if had.get("rows") == covers["rows"] and had.get("fingerprint") == covers["fingerprint"]:
            return True
        history = self.records_history(covers["records"])
        prefix = {"rows": had.get("rows"), "fingerprint": had.get("fingerprint")}
        now = {"rows": covers["rows"], "fingerprint": covers["fingerprint"]}
        if prefix not in history or now not in history or prefix["rows"] > now["rows"]:
            return False
        out.grow(n_rows)
        out.group.attrs.update({"covers": dict(covers),  # last: a grow cut short is redone
                                "records_fingerprint": covers["fingerprint"]})
        return True

    def output(self, path: str, *, lease: str | None = None) -> Output:
        """Open an existing output (its arrays and attributes are checked first).

        Parameters
        ----------
        path : str
        lease : str, optional
            Token of the write lease the caller's run holds on ``path``
            (``Lease.info.token``). Every commit first checks that this lease is still the
            run's (:class:`~atomline.stages.errors.LeaseLost` otherwise); without a token,
            every commit checks that no other live run holds the output
            (:class:`~atomline.stages.errors.LeaseHeld`).
        """
        node = self._node(_check_output_path(path), "output")
        if not isinstance(node, zarr.Group):
            raise LayoutError(problem(path, "an output group", "an array", "Rebuild the output."))
        store, name = self._lease_store(), self._lease_name(path)
        if lease is None:
            guard = lambda: _leases.check_not_leased(store, name, _leases._HELD_LEASES)  # noqa: E731
        else:
            guard = lambda: _leases.check_held(store, name, lease, _leases._HELD_LEASES)  # noqa: E731
        return Output(node, path, guard)

    def has_output(self, path: str) -> bool:
        """Whether a fully created output group exists at ``path``."""
        return path in self.root and "done" in self.root[_check_output_path(path)]


def iter_row_chunks(arr: zarr.Array, chunks: list[int] | None = None) -> Iterator[tuple[int, slice]]:
    """Yield ``(chunk number, row slice)`` for the row chunks of ``arr``.

    Parameters
    ----------
    arr : zarr.Array of shape (n, ...)
    chunks : list of int, optional
        Only these chunk numbers; all by default.
    """
    rows = arr.chunks[0]
    n = arr.shape[0]
    for c in range(-(-n // rows)) if chunks is None else chunks:
        yield c, slice(c * rows, min(n, (c + 1) * rows))
