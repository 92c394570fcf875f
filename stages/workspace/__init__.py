"""The workspace: one Zarr v3 group that holds everything a pipeline produces.

This is the only module that knows the layout::

    data/<name>               records (n, d), (n, L) or (n, H, W[, C]); float32/float64
                              (or a group that links to an array in another store)
    labels/<name>             (n,) integer class labels
    dictionaries/<id>/        atoms (k, d) + preprocessing arrays; attrs describe it
    codes/<dict-id>/<name>/   index (rows, q) int32, value (rows, q) float32,
                              count (rows,) int32, done (n_chunks,) uint8
    features/<dict-id>/<name>/values (n, F) float32, done (n_chunks,) uint8
    evaluations/<run-id>/     one group per evaluation (append-only)
    decisions/<id>/           one group per promotion-gate decision (append-only, attrs)
    reports/<run-id>/<name>   pictures: uint8 arrays holding PNG files' bytes
    .leases/<output>.json     write leases of running stages (not Zarr nodes)

A done flag is 0 (to do), 1 (done) or 2 (done without data: its input chunk was bad
and the run was told to skip it; the output's ``skipped`` attribute lists the rows).

The root group's attributes carry the layout version and the pointer to the promoted
dictionary. A whole run is one URL: a local directory, or any fsspec URL such as
``memory://name`` or ``s3://bucket/prefix``.

Chunk protocol (see :class:`Output`): work is cut along the records' row chunks; a task
owns whole output chunks; it writes the data of a chunk first and the chunk's done flag
last, and a rerun skips chunks whose flag is set.

Example::

    >>> import numpy as np
    >>> from atomline.stages.workspace import Workspace
    >>> ws = Workspace.open("memory://doc-example", create=True)
    >>> info = ws.add_records("signals", np.zeros((10, 32), dtype=np.float32), chunk_rows=4)
    >>> info["n_chunks"], ws.records("signals").shape
    (3, (10, 32))
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import time
from dataclasses import dataclass
from typing import Any, Callable, Iterator

import numpy as np
import zarr

from . import leases as _leases
from .safety import ContainedLocalStore, check_array_metadata, require_attrs
from ..errors import (AtomlineError, BadChunk, FingerprintMismatch, InputError, LayoutError,
                     LeaseHeld, NotFound, OutputExists, StoreFault, not_writable, problem,
                     unwritable)

__all__ = ["Workspace", "Output", "StoredDictionary", "LAYOUT_VERSION", "fingerprint_params",
           "BAD_CHUNK_CHOICES", "check_bad_chunk_choice",
           "resolve_storage_options", "STORAGE_OPTIONS_ENV"]

#: Version of the layout above. A store with a larger number was written by a newer
#: atomline and is refused rather than misread.
LAYOUT_VERSION = 1
_MARK = "atomline"
_TARGET_CHUNK_BYTES = 4 * 2**20  # ~4 MiB of input per row chunk unless told otherwise
#: Records are fingerprinted in blocks of about this many bytes, a row count fixed by the
#: row shape and dtype alone, so the fingerprint does not depend on the Zarr chunking and
#: an append re-reads at most one block (the partial last one).
_DIGEST_BLOCK_BYTES = 4 * 2**20
#: Environment variable holding storage options (JSON, or ``@path`` of a JSON file) for
#: workspaces on fsspec URLs; see :func:`resolve_storage_options`.
STORAGE_OPTIONS_ENV = "ATOMLINE_STORAGE_OPTIONS"
#: What a stage does with an input chunk that is missing or unreadable.
BAD_CHUNK_CHOICES = ("stop", "skip")
_DONE, _SKIPPED = 1, 2  # done-flag values
#: Tokens of the leases this process holds (a holder may write its own outputs).
_HELD_LEASES: set[str] = set()
#: Attributes each kind of entry must carry, with their JSON types.
_RECORDS_ATTRS = {"fingerprint": str}
_LINK_ATTRS = {"fingerprint": str, "link": dict, "shape": list, "dtype": str}
_DICTIONARY_ATTRS = {"fingerprint": str, "prep_arrays": list}
_DICTIONARY_OPTIONAL = {"preprocessing": dict, "geometry": dict, "coder": str, "coder_options": dict,
                        "n_atoms": int, "n_features": int, "method": str}
_OUTPUT_ATTRS = {
    "codes": {"fingerprint": str, "records": str, "dict_id": str, "records_fingerprint": str,
              "dictionary_fingerprint": str, "params": dict, "patches_per_record": int,
              "record_chunk_rows": int, "geometry": dict, "n_atoms": int, "width": int},
    "features": {"fingerprint": str, "records": str, "dict_id": str, "codes_fingerprint": str,
                 "coder": str, "params": dict, "n_features": int, "n_regions": int},
}
_EVALUATION_ATTRS = {"run_id": str, "dict_id": str, "records": str, "metrics": dict}


def _package_version() -> str:
    try:
        from importlib.metadata import version

        return version("atomline")
    except Exception:  # running from a source tree that was never installed
        return "unknown"


def fingerprint_params(params: dict) -> str:
    """Stable digest of a parameter dictionary (plain JSON types).

    Parameters
    ----------
    params : dict

    Returns
    -------
    str
        16 hex digits of the SHA-256 of the canonical JSON form.
    """
    text = json.dumps(params, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _check_output_path(path: str) -> str:
    """Output paths are ``codes|features/<dict-id>/<records>``: nothing may escape them."""
    parts = path.split("/") if isinstance(path, str) else []
    if len(parts) != 3 or parts[0] not in _OUTPUT_ATTRS:
        raise InputError(problem("output path", "codes/<dict-id>/<records> or features/<dict-id>/<records>",
                                 repr(path), "Use the stage's codes_path/features_path."))
    for part in parts[1:]:
        _check_name(part, f"output path {path!r}")
    return path


def _check_name(name: str, what: str) -> str:
    """Names become path segments: refuse anything that could escape its folder."""
    if (
        not isinstance(name, str)
        or not name
        or name in {".", ".."}
        or any(c in name for c in "/\\\0")
        or any(ord(c) < 32 or ord(c) == 127 for c in name)  # newlines, tabs, escapes
        or name.startswith(".")
    ):
        raise InputError(problem(what, "a plain name (letters, digits, '-', '_')", repr(name),
                                 "Choose a name without slashes, control characters or leading dots."))
    return name


@dataclass(frozen=True)
class StoredDictionary:
    """A dictionary read back from a workspace.

    Attributes
    ----------
    dict_id : str
    atoms : ndarray of shape (k, d), float64
    attrs : dict
        Everything recorded with it (method, parameters, seed, geometry, fingerprints,
        diagnostics, preprocessing, created time, package version).
    arrays : dict of str to ndarray
        Preprocessing arrays stored beside the atoms.
    """

    dict_id: str
    atoms: np.ndarray
    attrs: dict
    arrays: dict

    @property
    def fingerprint(self) -> str:
        """Digest of the atoms and their preprocessing."""
        return self.attrs["fingerprint"]


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



class Workspace:
    """An atomline workspace on any Zarr store.

    Use :meth:`open`; the constructor takes an already opened root group.
    """

    def __init__(self, root: zarr.Group, url: str, storage_options: dict | None = None):
        self.root = root
        self.url = url
        self.storage_options = storage_options

    # ------------------------------------------------------------------ opening
    @classmethod
    def open(
        cls,
        url: str | os.PathLike,
        *,
        create: bool = False,
        storage_options: dict | None = None,
    ) -> "Workspace":
        """Open a workspace, or create one.

        Parameters
        ----------
        url : str or path
            Local directory or fsspec URL (``memory://…``, ``s3://…``).
        create : bool
            Create an empty workspace if none is there (an existing one is opened).
        storage_options : dict, optional
            Passed to fsspec (credentials, endpoint). Never written into the workspace.

        Returns
        -------
        Workspace

        Raises
        ------
        LayoutError
            The store holds something that is not an atomline workspace, or a layout
            version this atomline does not know.
        NotFound
            No workspace at ``url`` and ``create`` is false.
        """
        url = _check_url(os.fspath(url), "workspace URL")
        storage_options = resolve_storage_options(url, storage_options)
        # A local directory (a path or file:// URL) takes no storage options: its store is ours.
        kwargs = {"storage_options": storage_options} if storage_options and _local_dir(url) is None else {}
        try:
            root = zarr.open_group(store=_store(url, "r+"), mode="r+", **kwargs)
        except (FileExistsError, NotADirectoryError) as exc:  # a local file, not a directory
            raise LayoutError(problem(f"workspace {url}", "a workspace directory", "a file",
                                      "Point atomline at the workspace's directory.")) from exc
        except (FileNotFoundError, zarr.errors.GroupNotFoundError) as exc:
            if not create:
                raise NotFound(problem(f"workspace {url}", "an atomline workspace",
                                       "nothing there",
                                       "Create one first (atomline add-records or demo).")) from exc
            if not _is_empty_place(url, storage_options):
                raise LayoutError(problem(f"workspace {url}", "an empty place or a workspace",
                                          "other files there",
                                          "Choose a new directory or URL.")) from exc
            root = zarr.open_group(store=_store(url, "a"), mode="a", zarr_format=3, **kwargs)
            root.attrs[_MARK] = {"layout": LAYOUT_VERSION, "promoted": None,
                                 "created": _now(), "version": _package_version()}
            for top in ("data", "labels", "dictionaries", "codes", "features", "evaluations"):
                root.require_group(top)
            return cls(root, url, storage_options)
        except (ValueError, TypeError, KeyError) as exc:  # unreadable root metadata
            raise LayoutError(problem(f"workspace {url}", "readable Zarr group metadata",
                                      f"{type(exc).__name__}: {exc}",
                                      "Point atomline at its own workspace.")) from exc
        mark = root.attrs.get(_MARK)
        if root.metadata.zarr_format != 3:
            raise LayoutError(problem(f"workspace {url}", "a Zarr v3 group",
                                      f"Zarr format {root.metadata.zarr_format}",
                                      "atomline workspaces are Zarr v3; link v2 arrays with link_records."))
        if not isinstance(mark, dict) or not isinstance(mark.get("layout"), int) or isinstance(mark.get("layout"), bool):
            raise LayoutError(problem(f"workspace {url}", f"a root attribute '{_MARK}' with a layout number",
                                      "a Zarr group written by something else",
                                      "Point atomline at its own workspace; link foreign arrays with link_records."))
        if mark["layout"] > LAYOUT_VERSION:
            raise LayoutError(problem(f"workspace {url}", f"layout version ≤ {LAYOUT_VERSION}",
                                      f"version {mark['layout']}",
                                      "Upgrade atomline to read this workspace."))
        require_attrs(mark, {"promoted": (str, type(None))}, f"workspace {url}, root {_MARK!r}")
        return cls(root, url, storage_options)

    def _mark(self) -> dict:
        return dict(self.root.attrs[_MARK])

    # ------------------------------------------------------------------ records
    def add_records(
        self,
        name: str,
        source: np.ndarray | str | os.PathLike,
        *,
        chunk_rows: int | None = None,
        overwrite: bool = False,
    ) -> dict:
        """Copy records into ``data/<name>``, chunk by chunk.

        Parameters
        ----------
        name : str
        source : ndarray of shape (n, ...) or path to a ``.npy`` file
            A ``.npy`` file is memory-mapped and streamed, so it may exceed memory.
        chunk_rows : int, optional
            Rows per Zarr chunk; by default about 4 MiB of data per chunk.
        overwrite : bool
            Replace an existing array of that name.

        Returns
        -------
        dict
            ``{"name", "shape", "dtype", "chunk_rows", "n_chunks", "fingerprint"}``
        """
        _check_name(name, "records name")
        arr = _array_like(source)
        check_records(arr, f"records {name!r}")
        path = f"data/{name}"
        self._refuse_existing(path, overwrite)
        rows = _default_chunk_rows(arr.shape, arr.dtype) if chunk_rows is None else chunk_rows
        if rows < 1:
            raise InputError(problem("chunk_rows", "a positive number of rows", str(rows),
                                     "Use chunk_rows of 1 or more (or leave it out)."))
        # A first streaming pass checks every value and computes the fingerprint, so bad
        # records are refused before anything (an entry being replaced included) is touched.
        digest = _Digest(arr.shape[1:], arr.dtype)
        for start in range(0, arr.shape[0], rows):
            block = np.asarray(arr[start : start + rows])
            check_finite(block, f"records {name!r}", start)
            digest.update(block)
        # Every chunk is stored, even an all-zero one, so a missing chunk object means a
        # lost chunk, never "all fill value".
        z = self.root.create_array(path, shape=arr.shape, chunks=(rows,) + arr.shape[1:],
                                   dtype=arr.dtype, overwrite=True,
                                   config={"write_empty_chunks": True})
        for start in range(0, arr.shape[0], rows):
            z[start : start + rows] = np.asarray(arr[start : start + rows])
        z.attrs.update({"all_chunks_stored": True, **_fingerprint_attrs(digest, [])})
        return self.describe_records(name)

    def link_records(self, name: str, url: str, path: str = "", *, overwrite: bool = False,
                     storage_options: dict | None = None) -> dict:
        """Use an existing Zarr array of another store as records, without copying.

        The link (URL and array path, never credentials) is kept in ``data/<name>``; the
        fingerprint is computed once now, in one streaming pass.

        Parameters
        ----------
        name : str
        url : str
            Store holding the array (directory or fsspec URL).
        path : str
            Path of the array inside that store ("" when the store is the array).
        storage_options : dict, optional
            For the linked store; used now and not persisted (pass them again later
            through :meth:`open`'s ``storage_options`` if the protocols match).

        Returns
        -------
        dict
            As :meth:`add_records`.
        """
        _check_name(name, "records name")
        _check_url(str(url), "linked store URL")
        _check_array_path(str(path))
        arr = _open_array(url, path, storage_options)
        check_records(arr, f"linked array {url}:{path}")
        target = f"data/{name}"
        self._refuse_existing(target, overwrite)
        digest = _Digest(arr.shape[1:], arr.dtype)
        rows = arr.chunks[0]
        absent = []
        for c, start in enumerate(range(0, arr.shape[0], rows)):
            if _absent_chunk_keys(arr, slice(start, min(arr.shape[0], start + rows))):
                absent.append(c)  # a foreign writer may leave all-fill chunks unstored
            block = arr[start : start + rows]
            check_finite(block, f"linked array {url}:{path}", start)
            digest.update(block)
        g = self.root.create_group(target, overwrite=True)
        g.attrs.update({"link": {"url": str(url), "path": str(path)}, "absent_chunks": absent,
                        "shape": list(arr.shape), "dtype": str(arr.dtype),
                        **_fingerprint_attrs(digest, [])})
        return self.describe_records(name)

    def append_records(
        self,
        name: str,
        source: np.ndarray | str | os.PathLike,
        *,
        labels: np.ndarray | str | os.PathLike | None = None,
    ) -> dict:
        """Append rows to ``data/<name>``, streaming them in whole chunks.

        Existing rows are never rewritten (the partial last chunk is filled up). The
        fingerprint is extended by re-reading at most one digest block, and the new
        length and fingerprint are added to the records' history, which is how codes and
        features made before the append know they cover a prefix and only the chunks
        from the old last one on need work. Attributes are written last: an append that
        stops half-way is rolled back by the next call.

        Parameters
        ----------
        name : str
            Existing records (copied in, not linked).
        source : ndarray of shape (m, *row shape) or path to a ``.npy`` file
            Same row shape and dtype as the records; a ``.npy`` file is memory-mapped.
        labels : ndarray of shape (m,) or path to a ``.npy`` file, optional
            Required when the records are labelled, refused otherwise.

        Returns
        -------
        dict
            As :meth:`describe_records`, plus ``"appended"`` (m) and ``"first_new_chunk"``.

        Raises
        ------
        InputError
            Other row shape or dtype, NaN/Inf (nothing is kept), missing or extra labels.
        """
        node = self._node(f"data/{_check_name(name, 'records name')}", "records")
        if isinstance(node, zarr.Group):
            raise InputError(problem(f"data/{name}", "records copied into the workspace",
                                     "a link to another store",
                                     "Append to the linked array where it lives, then link it again."))
        source = _array_like(source)
        # Store every chunk, zeros included, as add_records does: a missing chunk object
        # then always means a lost chunk (see read_chunk).
        z = node.with_config({"write_empty_chunks": True})
        where = f"rows appended to {name!r}"
        check_records(source, where)
        if tuple(source.shape[1:]) != tuple(z.shape[1:]) or np.dtype(source.dtype) != z.dtype:
            raise InputError(problem(where, f"rows of shape {tuple(z.shape[1:])}, {z.dtype}",
                                     f"{tuple(source.shape[1:])}, {source.dtype}",
                                     "Convert the new rows to the archive's row shape and dtype."))
        m = int(source.shape[0])
        new_labels = self._appended_labels(name, labels, m)
        attrs = dict(z.attrs)
        old = _recorded_rows(z)
        tail = tuple(z.shape[1:])
        if z.shape[0] != old:  # an earlier append stopped before its attributes: drop it
            z.resize((old, *tail))
        digest = _Digest(tail, z.dtype, attrs.get("digest_blocks"))
        digest.update_from(z, old)  # only the partial last block is read again
        z.resize((old + m, *tail))
        rows = int(z.chunks[0])
        start = old
        try:
            while start < old + m:
                stop = min(old + m, (start // rows + 1) * rows)  # up to the next chunk edge
                block = np.asarray(source[start - old : stop - old])
                check_finite(block, where, start - old)
                z[start:stop] = block
                digest.update(block)
                start = stop
        except InputError:
            z.resize((old, *tail))
            raise
        if new_labels is not None:
            lab = self.root[f"labels/{name}"]
            lab.resize((old + m,))
            lab[old:] = new_labels
        history = attrs.get("history") or [{"rows": old, "fingerprint": attrs["fingerprint"]}]
        z.attrs.update(_fingerprint_attrs(digest, history))  # last: the append counts from here
        info = self.describe_records(name)
        info.update(appended=m, first_new_chunk=old // rows)
        return info

    def _appended_labels(self, name: str, labels: Any, m: int) -> np.ndarray | None:
        """Validate the labels of appended rows against whether the records are labelled."""
        if isinstance(labels, (str, os.PathLike)):
            labels = load_npy(labels)
        if not self.has_labels(name):
            if labels is not None:
                raise InputError(problem(f"labels of rows appended to {name!r}", "none (unlabelled records)",
                                         f"{np.shape(labels)[0]} labels", "Add labels for all rows first."))
            return None
        if labels is None:
            raise InputError(problem(f"rows appended to {name!r}", f"{m} labels (the records are labelled)",
                                     "no labels", "Pass labels= with one label per new row."))
        labels = np.asarray(labels)
        if labels.ndim != 1 or labels.dtype.kind not in "iu" or labels.shape[0] != m:
            raise InputError(problem(f"labels of rows appended to {name!r}", f"{m} integer labels",
                                     f"shape {labels.shape}, dtype {labels.dtype}",
                                     "Pass one integer label per new row."))
        labels = check_labels(labels, f"labels of rows appended to {name!r}")
        lab = self.root[f"labels/{name}"]
        old = _recorded_rows(self._node(f"data/{name}", "records"))
        if lab.shape[0] != old:  # an earlier append stopped half-way
            lab.resize((old,))
        return labels

    def records_history(self, name: str) -> list[dict]:
        """Every length the records have had: ``[{"rows", "fingerprint"}, …]``, oldest first."""
        attrs = dict(self._node(f"data/{name}", "records").attrs)
        return list(attrs.get("history") or [{"rows": self.records(name).shape[0],
                                              "fingerprint": attrs["fingerprint"]}])

    def records(self, name: str) -> zarr.Array:
        """The records array ``data/<name>`` (following a link), validated.

        Returns
        -------
        zarr.Array of shape (n, ...)
        """
        node = self._node(f"data/{_check_name(name, 'records name')}", "records")
        if isinstance(node, zarr.Group):
            link = node.attrs.get("link")
            if not isinstance(link, dict):
                raise LayoutError(problem(f"data/{name}", "an array or a link", "a plain group",
                                          "Re-add the records."))
            require_attrs(dict(node.attrs), _LINK_ATTRS, f"data/{name}")
            require_attrs(link, {"url": str, "path": str}, f"data/{name}, link")
            _check_url(link["url"], f"data/{name}, link URL")
            _check_array_path(link["path"])
            arr = _open_array(link["url"], link["path"], self.storage_options)
            if list(arr.shape) != node.attrs["shape"] or str(arr.dtype) != node.attrs["dtype"]:
                raise FingerprintMismatch(problem(
                    f"linked records {name!r}", f"shape {node.attrs['shape']} {node.attrs['dtype']}",
                    f"{list(arr.shape)} {arr.dtype}", "The linked array changed: link it again."))
        else:
            arr = node
            require_attrs(dict(node.attrs), _RECORDS_ATTRS, f"data/{name}")
            if arr.shape[0] != _recorded_rows(arr):
                raise LayoutError(problem(
                    f"records {name!r}", f"{_recorded_rows(arr)} rows (as fingerprinted)",
                    f"{arr.shape[0]} rows: an append stopped half-way",
                    "Run the append again; it drops the unfinished rows first."))
        check_records(arr, f"records {name!r}")
        return arr

    def records_fingerprint(self, name: str) -> str:
        """Fingerprint of ``data/<name>`` recorded when it was added or linked."""
        node = self._node(f"data/{_check_name(name, 'records name')}", "records")
        return require_attrs(dict(node.attrs), _RECORDS_ATTRS, f"data/{name}")["fingerprint"]

    def read_chunk(self, name: str, chunk: int, arr: zarr.Array | None = None) -> np.ndarray:
        """Read and check one row chunk of ``data/<name>``.

        Parameters
        ----------
        name : str
            Records name.
        chunk : int
            Row-chunk number.
        arr : zarr.Array, optional
            The opened records (``records(name)``), to save opening them per chunk.

        Returns
        -------
        ndarray of shape (rows, ...)

        Raises
        ------
        BadChunk
            The chunk's object is missing from the store, cannot be decoded, or holds
            NaN/Inf; the message names the records, the chunk and its rows.
        """
        arr = self.records(name) if arr is None else arr
        rows = next(iter_row_chunks(arr, [chunk]))[1]
        where = f"records {name!r}, chunk {chunk} (rows {rows.start}..{rows.stop - 1})"
        fix = "Restore the chunk from its source, or rerun with on_bad_chunk='skip' (--on-bad-chunk skip)."
        # Records stored in the workspace are their own node (its attributes came with
        # ``arr``, no store round trip per chunk); a link's node is the group holding it.
        in_place = arr.store is self.root.store and arr.path == f"{self.root.path}/data/{name}".lstrip("/")
        attrs = arr.attrs if in_place else self.root[f"data/{name}"].attrs
        if attrs.get("all_chunks_stored") or "absent_chunks" in attrs:
            if chunk not in attrs.get("absent_chunks", []):
                missing = _absent_chunk_keys(arr, rows)
                if missing:
                    raise BadChunk(problem(where, "a stored chunk", f"no object at {missing[0]!r}", fix))
        try:
            block = np.asarray(arr[rows])
        except AtomlineError:  # a refusal (a linked chunk file) is not a bad chunk to skip
            raise
        except Exception as exc:
            raise BadChunk(problem(where, "a chunk that decodes", f"{type(exc).__name__}: {exc}",
                                   fix)) from exc
        finite = np.isfinite(block.reshape(block.shape[0], -1)).all(axis=1)
        if not finite.all():
            row = rows.start + int(np.flatnonzero(~finite)[0])
            raise BadChunk(problem(f"{where}, row {row}", "finite values", "NaN or Inf", fix))
        return block

    def describe_records(self, name: str) -> dict:
        """Plain-JSON facts about ``data/<name>``."""
        arr = self.records(name)
        return {"name": name, "shape": list(arr.shape), "dtype": str(arr.dtype),
                "chunk_rows": int(arr.chunks[0]), "n_chunks": int(arr.cdata_shape[0]),
                "fingerprint": self.records_fingerprint(name)}

    # ------------------------------------------------------------------ labels
    def add_labels(self, name: str, labels: np.ndarray | str | os.PathLike, *,
                   overwrite: bool = False) -> dict:
        """Store integer class labels for the records of the same name.

        Parameters
        ----------
        name : str
            The records they label (``data/<name>`` must exist).
        labels : ndarray of shape (n,) or path to a ``.npy`` file
            Integer labels, one per record.

        Returns
        -------
        dict
            ``{"name", "n", "classes"}``
        """
        _check_name(name, "labels name")
        if isinstance(labels, (str, os.PathLike)):
            labels = load_npy(labels)
        labels = np.asarray(labels)
        n = self.records(name).shape[0]
        if labels.ndim != 1 or labels.dtype.kind not in "iu":
            raise InputError(problem(f"labels {name!r}", "a 1-D integer array",
                                     f"shape {labels.shape}, dtype {labels.dtype}",
                                     "Encode classes as integers 0..C-1."))
        if labels.shape[0] != n:
            raise InputError(problem(f"labels {name!r}", f"{n} labels (one per record)",
                                     f"{labels.shape[0]}", "Pass one label per record."))
        labels = check_labels(labels, f"labels {name!r}")
        path = f"labels/{name}"
        self._refuse_existing(path, overwrite)
        self.root.create_array(path, data=labels, overwrite=True)
        return {"name": name, "n": int(n), "classes": sorted(int(c) for c in np.unique(labels))}

    def labels(self, name: str) -> np.ndarray:
        """ndarray of shape (n,), int64: the labels of ``data/<name>``."""
        node = self._node(f"labels/{_check_name(name, 'labels name')}", "labels")
        if not isinstance(node, zarr.Array) or node.ndim != 1 or np.dtype(node.dtype).kind not in "iu":
            raise LayoutError(problem(f"labels/{name}", "a 1-D integer array", f"{node}",
                                      "Add the labels again (add_labels, overwrite=True)."))
        return np.asarray(node[:])

    def labels_fingerprint(self, name: str) -> str:
        """16 hex digits of the SHA-256 of the labels of ``data/<name>`` (as int64)."""
        return hashlib.sha256(np.ascontiguousarray(self.labels(name), dtype=np.int64).tobytes()).hexdigest()[:16]

    def has_labels(self, name: str) -> bool:
        """Whether ``labels/<name>`` exists."""
        return f"labels/{name}" in self.root

    # ------------------------------------------------------------------ dictionaries
    def save_dictionary(self, dict_id: str, atoms: np.ndarray, attrs: dict,
                        arrays: dict[str, np.ndarray] | None = None) -> StoredDictionary:
        """Store a dictionary; it counts as complete only once its attributes are written.

        Parameters
        ----------
        dict_id : str
        atoms : ndarray of shape (k, d)
        attrs : dict
            Plain JSON: method, params, seed, geometry, preprocessing, fingerprints,
            diagnostics. ``created``, ``version`` and ``fingerprint`` are added.
        arrays : dict of str to ndarray, optional
            Preprocessing arrays (mean, whitening, …).

        Returns
        -------
        StoredDictionary
        """
        _check_name(dict_id, "dictionary id")
        path = f"dictionaries/{dict_id}"
        _check_atoms(np.asarray(atoms), path)
        for key, value in (arrays or {}).items():
            value = np.asarray(value)
            if value.dtype.kind not in "biuf" or not np.isfinite(value).all():
                raise InputError(problem(f"{path}, array {key!r}", "finite numbers",
                                         f"dtype {value.dtype}" + ("" if value.dtype.kind not in "f" else " with NaN/Inf"),
                                         "Fix the preprocessing before storing the dictionary."))
        if path in self.root and self.root[path].attrs.get("complete"):
            raise OutputExists(problem(path, "a new dictionary id", "a finished dictionary",
                                       "Use another id, or reuse the stored one."))
        self._refuse_leased(path)
        g = self.root.create_group(path, overwrite=True)
        atoms = np.ascontiguousarray(atoms, dtype=np.float64)
        g.create_array("atoms", data=atoms)
        arrays = arrays or {}
        for key, value in arrays.items():
            g.create_array(f"prep_{_check_name(key, 'array name')}", data=np.asarray(value))
        digest = hashlib.sha256(atoms.tobytes())
        for key in sorted(arrays):
            digest.update(np.ascontiguousarray(arrays[key]).tobytes())
        digest.update(json.dumps(attrs.get("preprocessing", {}), sort_keys=True).encode())
        full = dict(attrs, fingerprint=digest.hexdigest()[:16], created=_now(),
                    version=_package_version(), prep_arrays=sorted(arrays))
        g.attrs.update(_plain(full))
        g.attrs["complete"] = True  # last: a crash before this leaves no usable dictionary
        return self.load_dictionary(dict_id)

    def load_dictionary(self, dict_id: str) -> StoredDictionary:
        """Read a complete dictionary.

        Returns
        -------
        StoredDictionary
        """
        path = f"dictionaries/{_check_name(dict_id, 'dictionary id')}"
        g = self._node(path, "dictionary")
        attrs = dict(g.attrs)
        if attrs.get("complete") is not True:
            raise NotFound(problem(path, "a complete dictionary",
                                   "one whose training did not finish",
                                   "Run the train flow again; it resumes."))
        require_attrs(attrs, _DICTIONARY_ATTRS, path, _DICTIONARY_OPTIONAL)
        names = attrs["prep_arrays"]
        if not all(isinstance(k, str) for k in names):
            raise LayoutError(problem(f"{path}, attribute 'prep_arrays'", "a list of names",
                                      repr(names)[:200], "Train the dictionary again."))
        arrays = {k: np.asarray(self._node(f"{path}/prep_{_check_name(k, 'array name')}", "array")[:])
                  for k in names}
        atoms = np.asarray(self._node(f"{path}/atoms", "atoms")[:])
        _check_atoms(atoms, path, LayoutError)
        if atoms.shape[0] != attrs.get("n_atoms", atoms.shape[0]) or (
                atoms.shape[1] != attrs.get("n_features", atoms.shape[1])):
            raise LayoutError(problem(f"{path}/atoms", f"shape ({attrs['n_atoms']}, {attrs.get('n_features')})",
                                      f"shape {atoms.shape}", "The dictionary was altered; train it again."))
        return StoredDictionary(dict_id, atoms, attrs, arrays)

    def save_encoder(self, dict_id: str, name: str, arrays: dict[str, np.ndarray],
                     attrs: dict) -> str:
        """Store a learned fast encoder beside the dictionary it was trained for.

        It lives under ``dictionaries/<dict_id>/encoders/<name>`` (arrays, then attributes,
        ``complete`` last) and is never rewritten.

        Parameters
        ----------
        dict_id : str
            A complete dictionary.
        name : str
        arrays : dict of str to ndarray
            The encoder's matrices and thresholds.
        attrs : dict
            Plain JSON describing it; a ``fingerprint`` of the arrays is added.

        Returns
        -------
        str
            The encoder's fingerprint.
        """
        self.load_dictionary(dict_id)
        path = f"dictionaries/{dict_id}/encoders/{_check_name(name, 'encoder name')}"
        self._refuse_existing(path, False)
        g = self.root.require_group(f"dictionaries/{dict_id}/encoders").create_group(name)
        digest = hashlib.sha256()
        for key in sorted(arrays):
            value = np.ascontiguousarray(arrays[key])
            g.create_array(_check_name(key, "array name"), data=value)
            digest.update(key.encode() + value.tobytes())
        fingerprint = digest.hexdigest()[:16]
        g.attrs.update(_plain(dict(attrs, fingerprint=fingerprint, created=_now(),
                                   arrays=sorted(arrays))))
        g.attrs["complete"] = True
        return fingerprint

    def load_encoder(self, dict_id: str, name: str) -> tuple[dict, dict[str, np.ndarray]]:
        """The attributes and arrays of a stored encoder (see :meth:`save_encoder`)."""
        path = f"dictionaries/{_check_name(dict_id, 'dictionary id')}/encoders/{_check_name(name, 'encoder name')}"
        g = self._node(path, "encoder")
        attrs = dict(g.attrs)
        if attrs.get("complete") is not True:
            raise NotFound(problem(path, "a complete encoder", "one whose writing did not finish",
                                   "Train the encoder again."))
        _check_group_members(g, path)
        return attrs, {k: np.asarray(g[k][:]) for k in attrs["arrays"]}

    def save_checkpoint(self, dict_id: str, state: dict) -> None:
        """Keep a learner's state while ``dictionaries/<dict_id>`` is being trained.

        The state (numpy arrays and plain-JSON values) goes into a new numbered group
        under ``dictionaries/<dict_id>/checkpoints``, whose ``complete`` attribute is
        written last; older checkpoints are removed only after that. Storing the
        finished dictionary replaces the whole group, checkpoints included.

        Parameters
        ----------
        dict_id : str
        state : dict
            As passed to a learner's ``checkpoint`` callback.
        """
        base = self.root.require_group(f"dictionaries/{_check_name(dict_id, 'dictionary id')}")
        ckpts = base.require_group("checkpoints")
        older = sorted(ckpts.group_keys())
        seq = f"{int(older[-1]) + 1:08d}" if older else f"{0:08d}"
        g = ckpts.create_group(seq)
        arrays, values = {}, {}
        for i, (key, value) in enumerate(sorted(state.items())):
            if isinstance(value, np.ndarray):
                g.create_array(f"a{i}", data=value)
                arrays[key] = f"a{i}"
            else:
                values[key] = value
        g.attrs.update(_plain({"arrays": arrays, "values": values}))
        g.attrs["complete"] = True
        for old in older:
            del ckpts[old]

    def load_checkpoint(self, dict_id: str) -> dict | None:
        """The latest complete checkpoint of a dictionary in training, or ``None``."""
        path = f"dictionaries/{_check_name(dict_id, 'dictionary id')}/checkpoints"
        if path not in self.root:
            return None
        for seq in sorted(self.root[path].group_keys(), reverse=True):
            g = self.root[f"{path}/{seq}"]
            attrs = dict(g.attrs)
            if attrs.get("complete") is not True:
                continue  # cut off while being written: fall back to the one before
            try:
                _check_group_members(g, f"{path}/{seq}")
                state = dict(attrs["values"])
                state.update({k: np.asarray(g[name][:]) for k, name in attrs["arrays"].items()})
            except (KeyError, FileNotFoundError):
                continue  # removed by its writer while being read (a newer one exists)
            return state
        return None

    def has_dictionary(self, dict_id: str) -> bool:
        """Whether a complete dictionary ``dict_id`` exists."""
        path = f"dictionaries/{dict_id}"
        return path in self.root and bool(self.root[path].attrs.get("complete"))

    def dictionary_ids(self) -> list[str]:
        """Ids of the complete dictionaries, oldest first."""
        ids = [k for k in self.root["dictionaries"].group_keys() if self.has_dictionary(k)]
        return sorted(ids, key=lambda k: self.root[f"dictionaries/{k}"].attrs.get("created", ""))

    @property
    def promoted(self) -> str | None:
        """Id of the promoted dictionary, or ``None``."""
        return self._mark().get("promoted")

    def promote(self, dict_id: str, *, evaluation: str | None = None) -> None:
        """Point the workspace at ``dict_id``.

        Parameters
        ----------
        dict_id : str
            A complete dictionary.
        evaluation : str, optional
            Run id of the evaluation that justifies the move. When given (the nightly
            gate always gives it), the pointer moves only if that evaluation is complete,
            measured ``dict_id``, and measured the features that are stored now, complete,
            under ``features/<dict_id>/<records>`` (same fingerprint).

        Raises
        ------
        NotFound, FingerprintMismatch, InputError
            Something the promotion rests on is missing or incomplete; the pointer is
            left where it was.
        """
        self.check_promotion(dict_id, evaluation=evaluation)
        with self.lease("promoted", run=f"promote {dict_id}"):  # one pointer move at a time
            mark = self._mark()
            mark["promoted"] = dict_id
            self.root.attrs[_MARK] = mark

    def check_promotion(self, dict_id: str, *, evaluation: str | None = None) -> None:
        """Refuse, without moving anything, a promotion that :meth:`promote` would refuse.

        The nightly gate checks first, records its decision, then moves the pointer, so a
        run killed in between finds its decision and only has the move left to do.
        """
        self.load_dictionary(dict_id)
        if evaluation is not None:
            attrs = self.evaluation(evaluation)
            where = f"evaluations/{evaluation}"
            if attrs["dict_id"] != dict_id:
                raise FingerprintMismatch(problem(where, f"an evaluation of {dict_id}",
                                                  f"one of {attrs['dict_id']}", "Evaluate the candidate first."))
            path = f"features/{dict_id}/{attrs['records']}"
            out = self.output(path)
            if not out.complete:
                raise InputError(problem(path, "complete features", "unfinished features",
                                         "Finish the pool flow before promoting."))
            if out.attrs["fingerprint"] != attrs.get("features_fingerprint"):
                raise FingerprintMismatch(problem(where, f"features fingerprint {out.attrs['fingerprint']}",
                                                  str(attrs.get("features_fingerprint")),
                                                  "The features changed since; evaluate again."))

    # ------------------------------------------------------------------ outputs
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
            guard = lambda: _leases.check_not_leased(store, name, _HELD_LEASES)  # noqa: E731
        else:
            guard = lambda: _leases.check_held(store, name, lease, _HELD_LEASES)  # noqa: E731
        return Output(node, path, guard)

    def has_output(self, path: str) -> bool:
        """Whether a fully created output group exists at ``path``."""
        return path in self.root and "done" in self.root[_check_output_path(path)]

    # ------------------------------------------------------------------ evaluations
    def append_evaluation(self, attrs: dict, arrays: dict[str, np.ndarray], *, key: str | None = None) -> str:
        """Add one evaluation; evaluations are never rewritten.

        The group is written under the ``evaluations`` lease: arrays, then attributes,
        then ``complete``. An unfinished group left by a killed writer (no ``complete``)
        is removed first, since under the lease no live writer can own it.

        Parameters
        ----------
        attrs : dict
            Plain JSON describing what was measured and the scores.
        arrays : dict of str to ndarray
        key : str, optional
            What the evaluation measured (``evaluate.evaluation_key``), so a rerun can find
            it with :meth:`find_evaluation` instead of adding a second one.

        Returns
        -------
        str
            The new run id.
        """
        with self._append_lease("evaluations"):
            self._remove_unfinished("evaluations")
            stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%S%f")
            run_id = f"e{stamp}-{os.urandom(3).hex()}"
            g = self.root.create_group(f"evaluations/{run_id}")
            for name, value in arrays.items():
                g.create_array(name, data=np.asarray(value))
            extra = {"key": key} if key is not None else {}
            g.attrs.update(_plain(dict(attrs, run_id=run_id, created=_now(), **extra)))
            g.attrs["complete"] = True
        return run_id

    def find_evaluation(self, key: str) -> dict | None:
        """The attributes of the latest complete evaluation with this ``key``, or ``None``."""
        return next((e for e in reversed(self.evaluations()) if e.get("key") == key), None)

    def evaluations(self) -> list[dict]:
        """Attributes of every complete evaluation, oldest first."""
        out = []
        for key in self.root["evaluations"].group_keys():
            try:
                attrs = self.evaluation(key)
            except (NotFound, LayoutError):
                continue  # a crash mid-write leaves an incomplete group: not an evaluation
            out.append(attrs)
        return sorted(out, key=lambda a: a["run_id"])

    def evaluation(self, run_id: str) -> dict:
        """Attributes of one complete evaluation.

        Raises
        ------
        NotFound
            No evaluation of that id, or one whose writing did not finish.
        """
        path = f"evaluations/{_check_name(run_id, 'evaluation id')}"
        try:
            attrs = dict(self._node(path, "evaluation").attrs)
        except (ValueError, TypeError) as exc:  # unreadable metadata (torn or foreign)
            raise LayoutError(problem(path, "readable metadata", str(exc), "Ignore or delete it.")) from exc
        if attrs.get("complete") is not True:
            raise NotFound(problem(path, "a complete evaluation", "one whose writing did not finish",
                                   "Run the evaluation again; incomplete ones are ignored."))
        return require_attrs(attrs, _EVALUATION_ATTRS, path)

    def evaluation_arrays(self, run_id: str) -> dict[str, np.ndarray]:
        """The arrays of one evaluation (confusion matrices, …)."""
        self.evaluation(run_id)
        g = self._node(f"evaluations/{run_id}", "evaluation")
        _check_group_members(g, f"evaluations/{run_id}")
        return {k: np.asarray(self._node(f"evaluations/{run_id}/{k}", "array")[:])
                for k in g.array_keys()}

    # ------------------------------------------------------------------ leases
    def lease(self, output: str, *, run: str | None = None, ttl: float = 120.0,
              break_existing: bool = False) -> _leases.Lease:
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
        lease = _leases.acquire(self._lease_store(), self._lease_name(output),
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
        if output in ("promoted", "evaluations", "decisions"):
            return output
        parts = output.split("/") if isinstance(output, str) else []
        if len(parts) == 2 and parts[0] == "dictionaries":
            _check_name(parts[1], "dictionary id")
            return output
        return _check_output_path(output)

    def _lease_store(self) -> _leases._LeaseStore:
        return _leases._LeaseStore(self.root.store, self.root.store_path.path)

    def _refuse_leased(self, path: str) -> None:
        _leases.check_not_leased(self._lease_store(), path, _HELD_LEASES)

    # ------------------------------------------------------------------ decisions
    def append_decision(self, attrs: dict) -> str:
        """Record one promotion-gate decision under ``decisions/<id>`` (append-only).

        Written under the ``decisions`` lease, ``complete`` last; an unfinished group left
        by a killed writer is removed first.

        Parameters
        ----------
        attrs : dict
            Plain JSON: outcome, candidate and promoted ids, the evaluations compared,
            and ``run_key`` (the nightly run's inputs, see :meth:`find_decision`).

        Returns
        -------
        str
            The new decision id.
        """
        with self._append_lease("decisions"):
            self._remove_unfinished("decisions")
            stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%S%f")
            decision_id = f"g{stamp}-{os.urandom(3).hex()}"
            g = self.root.require_group("decisions").create_group(decision_id)
            g.attrs.update(_plain(dict(attrs, decision_id=decision_id, created=_now())))
            g.attrs["complete"] = True
        return decision_id

    def decisions(self) -> list[dict]:
        """Attributes of every complete gate decision, oldest first (unfinished ones are ignored)."""
        if "decisions" not in self.root:
            return []
        out = []
        for k in self.root["decisions"].group_keys():
            try:
                out.append(dict(self.root[f"decisions/{k}"].attrs))
            except (ValueError, TypeError, KeyError):
                continue  # unreadable metadata of an unfinished group: not a decision
        return sorted((a for a in out if a.get("complete") is True), key=lambda a: a["decision_id"])

    def find_decision(self, run_key: str) -> dict | None:
        """The latest complete decision recorded with this ``run_key``, or ``None``."""
        return next((d for d in reversed(self.decisions()) if d.get("run_key") == run_key), None)

    def _append_lease(self, log: str) -> _leases.Lease:
        """The lease of an append-only log (``evaluations`` or ``decisions``).

        Held only while one entry is written (well under a second), so a second writer
        waits for it a few seconds rather than failing at once.
        """
        for _ in range(100):
            try:
                return self.lease(log, run=f"append to {log} (pid {os.getpid()})")
            except LeaseHeld:
                time.sleep(0.1)
        return self.lease(log, run=f"append to {log} (pid {os.getpid()})")

    def _remove_unfinished(self, log: str) -> None:
        """Delete the entries of ``log`` whose ``complete`` attribute was never written.

        Call only while holding the log's lease: every writer holds it until its entry is
        complete, so an unfinished entry seen then belongs to a writer that died.
        """
        if log not in self.root:
            return
        group = self.root[log]
        for k in list(group.group_keys()):
            try:
                finished = group[k].attrs.get("complete") is True
            except (ValueError, TypeError, KeyError):
                finished = False  # metadata cut off mid-write
            if not finished:
                del group[k]

    # ------------------------------------------------------------------ pictures
    def save_picture(self, report_id: str, name: str, png: bytes, attrs: dict) -> str:
        """Store a PNG picture as bytes under ``reports/<report_id>/<name>``.

        Pictures live in the same store as everything else (a uint8 Zarr array holding
        the PNG file's bytes), so they travel with the workspace on any fsspec URL.

        Parameters
        ----------
        report_id : str
            Usually the evaluation run id the picture belongs to.
        name : str
        png : bytes
            A complete PNG file.
        attrs : dict
            Plain JSON (title, width, height, …); ``media_type`` is added.

        Returns
        -------
        str
            The picture's path in the workspace.
        """
        path = f"reports/{_check_name(report_id, 'report id')}/{_check_name(name, 'picture name')}"
        if not png.startswith(b"\x89PNG"):
            raise InputError(problem(path, "PNG bytes", f"{png[:8]!r}", "Render the picture as PNG."))
        if path in self.root and self._picture_attrs(path) is None:
            del self.root[path]  # bytes without attributes: cut off while being stored
        self._refuse_existing(path, False)
        self.root.require_group("reports").require_group(report_id)
        arr = self.root.create_array(path, data=np.frombuffer(png, dtype=np.uint8))
        arr.attrs.update(_plain(dict(attrs, media_type="image/png", created=_now())))
        return path

    def pictures(self) -> list[dict]:
        """Every stored picture: ``path``, ``report_id``, ``name``, ``bytes`` and its attrs."""
        if "reports" not in self.root:
            return []
        out = []
        for report_id in sorted(self.root["reports"].group_keys()):
            group = self.root[f"reports/{report_id}"]
            for name in sorted(group.array_keys()):
                attrs = self._picture_attrs(f"reports/{report_id}/{name}")
                if attrs is None:
                    continue  # its writer died between the bytes and the attributes
                out.append(dict(attrs, path=f"reports/{report_id}/{name}", report_id=report_id,
                                name=name, bytes=int(group[name].shape[0])))
        return out

    def _picture_attrs(self, path: str) -> dict | None:
        """A stored picture's attributes, or ``None`` while they were never written."""
        try:
            attrs = dict(self.root[path].attrs)
        except (ValueError, TypeError, KeyError):
            return None
        return attrs if attrs.get("media_type") == "image/png" else None

    def picture(self, path: str) -> bytes:
        """The PNG bytes of a stored picture (a path from :meth:`pictures`)."""
        if not path.startswith("reports/"):
            raise NotFound(problem(path, "a picture path under reports/", path,
                                   "List them with Workspace.pictures()."))
        return np.asarray(self._node(path, "picture")[:]).tobytes()

    # ------------------------------------------------------------------ listing
    def summary(self) -> dict:
        """What the workspace holds, as plain JSON."""
        data = {}
        for name in self.root["data"].keys():
            data[name] = self.describe_records(name)
            data[name]["labelled"] = self.has_labels(name)
        dicts = {}
        for dict_id in self.dictionary_ids():
            a = self.root[f"dictionaries/{dict_id}"].attrs
            dicts[dict_id] = {"method": a.get("method"), "n_atoms": a.get("n_atoms"),
                              "records": a.get("records"), "created": a.get("created")}
        outputs = {}
        for top in ("codes", "features"):
            for dict_id in self.root[top].group_keys():
                for name in self.root[f"{top}/{dict_id}"].group_keys():
                    out = self.output(f"{top}/{dict_id}/{name}")
                    flags = out.done_flags()
                    outputs[f"{top}/{dict_id}/{name}"] = {"chunks_done": int(flags.sum()),
                                                          "n_chunks": int(flags.size)}
        evaluations = self.evaluations()
        latest = None
        if evaluations:
            e = evaluations[-1]
            latest = {"run_id": e["run_id"], "dict_id": e["dict_id"], "tag": e.get("tag", ""),
                      "metrics": {k: v.get("accuracy") for k, v in e["metrics"].items()}}
        return {"url": self.url, "layout": LAYOUT_VERSION, "promoted": self.promoted,
                "records": data, "dictionaries": dicts, "outputs": outputs,
                "evaluations": len(evaluations), "latest_evaluation": latest,
                "decisions": len(self.decisions()),
                "pictures": [{k: p[k] for k in ("path", "title", "bytes") if k in p}
                             for p in self.pictures()]}

    # ------------------------------------------------------------------ helpers
    def _node(self, path: str, what: str) -> Any:
        _check_stored_node(self.root.store, f"{self.root.store_path.path}/{path}", path)
        try:
            present = path in self.root
            node = self.root[path] if present else None
        except (ValueError, TypeError, KeyError) as exc:  # metadata zarr cannot parse
            raise LayoutError(problem(path, f"a readable {what}", f"{type(exc).__name__}: {exc}"[:300],
                                      "The store was altered or written by something else.")) from exc
        if not present:
            raise NotFound(problem(path, f"an existing {what}", "nothing at that path",
                                   f"List the workspace (atomline show {self.url}) for what is there."))
        if isinstance(node, zarr.Array):
            _check_safe(node, path)
        return node

    def _refuse_existing(self, path: str, overwrite: bool) -> None:
        if path in self.root and not overwrite:
            raise OutputExists(problem(path, "a free name", "an existing entry",
                                       "Pick another name or pass overwrite=True (--overwrite)."))


# ---------------------------------------------------------------------- validation
#: The first bytes of every .npy file (numpy's format description, NEP 1).
_NPY_MAGIC = b"\x93NUMPY"


def load_npy(path: str | os.PathLike, *, mmap: bool = False) -> np.ndarray:
    """Read a ``.npy`` file, memory-mapped with ``mmap``; refuse anything else clearly.

    Raises
    ------
    InputError
        No such file, not a ``.npy`` file (a text or ``.csv`` file, say), or an array of
        Python objects (which would need unpickling to read).
    """
    path = os.fspath(path)
    where = f"file {path}"
    try:
        with open(path, "rb") as fh:
            head = fh.read(len(_NPY_MAGIC))
    except FileNotFoundError:
        raise InputError(problem(where, "a .npy file", "no such file", "Check the path.")) from None
    except IsADirectoryError:
        raise InputError(problem(where, "a .npy file", "a directory", "Give the path of the file.")) from None
    if head != _NPY_MAGIC:
        raise InputError(problem(where, "a .npy file (numpy.save's binary format)",
                                 f"a file starting with {head!r}",
                                 "Convert it first, e.g. numpy.save('x.npy', numpy.loadtxt(path, delimiter=','))."))
    try:
        return np.load(path, mmap_mode="r" if mmap else None, allow_pickle=False)
    except ValueError as exc:  # numpy refuses object arrays without unpickling
        raise InputError(problem(where, "a numeric .npy array", f"an array numpy cannot read safely ({exc})",
                                 "Save a float or integer array with numpy.save.")) from exc


def check_records(arr: Any, where: str) -> None:
    """Refuse records of a shape or dtype the stages cannot use.

    Parameters
    ----------
    arr : array-like with ``shape`` and ``dtype``
    where : str
        Name used in the message.

    Raises
    ------
    InputError
    """
    dtype = np.dtype(arr.dtype)
    if dtype.kind != "f" or dtype.itemsize not in (4, 8):
        raise InputError(problem(where, "float32 or float64 records", f"dtype {dtype}",
                                 "Convert the records to float32 before adding them."))
    if len(arr.shape) not in (2, 3, 4):
        raise InputError(problem(where, "rank 2 (n, L), 3 (n, H, W) or 4 (n, H, W, C)",
                                 f"shape {tuple(arr.shape)}", "Put one record per row."))
    if arr.shape[0] == 0 or int(np.prod(arr.shape[1:])) == 0:
        raise InputError(problem(where, "at least one non-empty record", f"shape {tuple(arr.shape)}",
                                 "Add some records."))


def _array_like(source: Any) -> Any:
    """Rows to copy: a ``.npy`` path memory-mapped, an array (numpy, zarr, memmap) as it
    is, anything else (nested lists, array-likes) through ``np.asarray``."""
    if isinstance(source, (str, os.PathLike)):
        return load_npy(source, mmap=True)
    if hasattr(source, "shape") and hasattr(source, "dtype"):
        return source
    try:
        return np.asarray(source)
    except (ValueError, TypeError) as exc:  # ragged lists
        raise InputError(problem("records", "an array or rows of equal length", f"{type(exc).__name__}: {exc}"[:200],
                                 "Pass a numpy array of shape (n, ...).")) from exc


def check_labels(labels: np.ndarray, where: str) -> np.ndarray:
    """Class numbers 0..C−1 as int64; refuse negative ones and any int64 cannot hold.

    Parameters
    ----------
    labels : ndarray of shape (n,), integer dtype
    where : str

    Returns
    -------
    ndarray of shape (n,), int64

    Raises
    ------
    InputError
        A negative label, or an unsigned one ≥ 2⁶³ (``astype(int64)`` would wrap it to a
        negative number silently); the message names the first such row.
    """
    if labels.size:
        bad = labels < 0 if labels.dtype.kind == "i" else labels > np.iinfo(np.int64).max
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            raise InputError(problem(f"{where}, row {row}", f"class numbers 0..{np.iinfo(np.int64).max}",
                                     f"label {labels[row]}", "Encode classes as integers 0..C-1."))
    return labels.astype(np.int64)


def check_bad_chunk_choice(on_bad_chunk: str) -> None:
    """Refuse an ``on_bad_chunk`` that is not one of :data:`BAD_CHUNK_CHOICES`."""
    if on_bad_chunk not in BAD_CHUNK_CHOICES:
        raise InputError(problem("on_bad_chunk", f"one of {BAD_CHUNK_CHOICES}", repr(on_bad_chunk),
                                 "Pick 'stop' or 'skip'."))


def check_finite(block: np.ndarray, where: str, first_row: int) -> None:
    """Refuse NaN or Inf, naming the first bad row."""
    finite = np.isfinite(block.reshape(block.shape[0], -1)).all(axis=1)
    if not finite.all():
        row = first_row + int(np.flatnonzero(~finite)[0])
        raise InputError(problem(f"{where}, row {row}", "finite values", "NaN or Inf",
                                 "Clean or drop the bad rows first."))


def _check_safe(arr: zarr.Array, where: str) -> None:
    """Refuse an array whose decoding could run code (see :mod:`._safety`)."""
    check_array_metadata(arr.metadata.to_dict(), where)


def _check_document(data: bytes | None, name: str, where: str) -> None:
    """Check one raw metadata document (``zarr.json`` or ``.zarray``) before Zarr parses it."""
    if data is None:
        return
    try:
        doc = json.loads(data)
    except ValueError as exc:
        raise LayoutError(problem(where, f"a JSON {name}", f"unreadable bytes ({exc})",
                                  "The store was altered; rebuild this entry.")) from exc
    if not isinstance(doc, dict):
        raise LayoutError(problem(where, f"a JSON object in {name}", type(doc).__name__,
                                  "The store was altered; rebuild this entry."))
    if name == ".zarray" or doc.get("node_type") == "array":
        check_array_metadata(doc, where)


def _check_stored_node(store: Any, path: str, where: str) -> None:
    """Check the raw metadata of the node at ``path`` of a zarr store (if it is an array)."""
    from zarr.core.buffer import default_buffer_prototype
    from zarr.core.sync import sync

    for name in ("zarr.json", ".zarray"):
        buf = sync(store.get(f"{path}/{name}".lstrip("/"), prototype=default_buffer_prototype()))
        _check_document(None if buf is None else buf.to_bytes(), name, where)


def _check_group_members(group: zarr.Group, where: str) -> None:
    """Check the raw metadata of every child of ``group`` before Zarr opens them."""
    from zarr.core.sync import sync

    async def children() -> list[str]:
        return [c async for c in group.store.list_dir(group.path)]

    for child in sync(children()):
        if child not in ("zarr.json", ".zattrs", ".zgroup", ".zarray"):
            _check_stored_node(group.store, f"{group.path}/{child}", f"{where}/{child}")


def _check_linked_metadata(url: str, path: str, storage_options: dict | None) -> None:
    """Check the raw metadata of a linked array with fsspec, before Zarr parses it."""
    import fsspec

    try:
        fs, base = fsspec.core.url_to_fs(url, **(storage_options or {}) if "://" in url else {})
    except Exception:  # an unknown protocol: zarr.open reports it next
        return
    where = f"linked array {url}:{path}"
    for name in ("zarr.json", ".zarray"):
        key = "/".join(p for p in (base.rstrip("/"), path.strip("/"), name) if p)
        try:
            data = fs.cat_file(key)
        except (FileNotFoundError, IsADirectoryError, NotADirectoryError):
            continue
        _check_document(data, name, where)


def _check_atoms(atoms: np.ndarray, where: str, error: type = InputError) -> None:
    """Atoms must be a non-empty (k, d) array of finite floats."""
    if atoms.ndim != 2 or 0 in atoms.shape or atoms.dtype.kind not in "f" or not np.isfinite(atoms).all():
        raise error(problem(f"{where}/atoms", "a non-empty (k, d) array of finite floats",
                            f"shape {atoms.shape}, dtype {atoms.dtype}"
                            + (" with NaN/Inf" if atoms.dtype.kind == "f" and not np.isfinite(atoms).all() else ""),
                            "Train the dictionary again."))


def _check_url(url: str, what: str) -> str:
    """Refuse URLs that carry credentials or climb out of their base with '..'."""
    if not isinstance(url, str) or not url or "\0" in url:
        raise InputError(problem(what, "a directory or fsspec URL", repr(url), "Give a URL."))
    if "://" in url:
        protocol, rest = url.split("://", 1)
        authority = rest.split("/", 1)[0]
        if "@" in authority:
            raise InputError(problem(what, "a URL without credentials", f"{protocol}://…@… (user info in the URL)",
                                     "Pass credentials through storage_options; they are never stored."))
        if ".." in rest.split("/"):
            raise InputError(problem(what, "a URL without '..' segments", repr(url),
                                     "Write the URL without '..'."))
    return url


def _check_array_path(path: str) -> str:
    """An array path inside a store: relative, no '..', no backslashes."""
    if not isinstance(path, str) or path.startswith("/") or "\\" in path or "\0" in path \
            or ".." in path.split("/") or "://" in path:
        raise InputError(problem("array path", "a relative path inside the store (no '..', no leading '/')",
                                 repr(path), "Give the path of the array inside its store."))
    return path


def _write_together(writes: list[tuple[zarr.Array, slice, np.ndarray]]) -> None:
    """Write several arrays' rows in one pass through Zarr's event loop, all finished on return.

    Each synchronous Zarr call is a round trip through one event-loop thread; writing a
    chunk's arrays concurrently makes it one, and lets their compression overlap.
    """
    import asyncio

    from zarr.core.sync import sync

    async def together():
        await asyncio.gather(*(arr.async_array.setitem(rows, values) for arr, rows, values in writes))

    sync(together())


def _absent_chunk_keys(arr: zarr.Array, rows: slice) -> list[str]:
    """Store keys of the stored chunks (or shards) holding ``rows`` that are not there."""
    import itertools

    from zarr.core.sync import sync

    meta = arr.metadata
    outer = meta.chunk_grid.chunk_shape if meta.zarr_format == 3 else meta.chunks
    first, last = rows.start // outer[0], (rows.stop - 1) // outer[0]
    others = [range(-(-n // c)) for n, c in zip(arr.shape[1:], outer[1:])]
    missing = []
    for coords in itertools.product(range(first, last + 1), *others):
        key = meta.encode_chunk_key(coords)
        if not sync((arr.store_path / key).exists()):
            missing.append(f"{arr.store_path.path}/{key}".lstrip("/"))
    return missing


def _recorded_rows(arr: zarr.Array) -> int:
    """Rows covered by the records' fingerprint (the last history entry)."""
    history = arr.attrs.get("history")
    return int(history[-1]["rows"]) if history else int(arr.shape[0])


def _fingerprint_attrs(digest: _Digest, history: list[dict]) -> dict:
    """Attributes of a records array after (re)hashing: fingerprint, blocks, history.

    ``history`` lists ``{"rows", "fingerprint"}`` for every length the records have had
    (one entry per add or append), so an output can tell that the records it covers are
    a prefix of the current ones.
    """
    fingerprint = digest.hexdigest()
    return {"fingerprint": fingerprint, "digest_blocks": list(digest.blocks),
            "history": list(history) + [{"rows": int(digest.rows), "fingerprint": fingerprint}]}


def _default_chunk_rows(shape: tuple[int, ...], dtype: np.dtype) -> int:
    row_bytes = int(np.prod(shape[1:])) * np.dtype(dtype).itemsize
    return int(max(1, min(shape[0], _TARGET_CHUNK_BYTES // max(row_bytes, 1))))


def resolve_storage_options(url: str, given: dict | None = None) -> dict | None:
    """Storage options (credentials, endpoint) for a workspace or store URL.

    Flows take the workspace as a URL only, because Prefect records flow parameters; the
    options reach every process that opens the store (flow, thread, process or Dask
    worker) through its environment instead:

    1. ``given`` — options passed in code (Python API); used as they are;
    2. else ``$ATOMLINE_STORAGE_OPTIONS``: a JSON object, or ``@/path/to/options.json``;
    3. else none: fsspec and s3fs find credentials their own way (fsspec's
       ``FSSPEC_S3_*`` variables and config files, ``AWS_*`` variables, profiles, roles).

    Options are never written into the workspace, a log or an error message.

    Parameters
    ----------
    url : str
        Local path or fsspec URL.
    given : dict, optional

    Returns
    -------
    dict or None
        ``None`` for local paths and when nothing is configured.

    Raises
    ------
    InputError
        The environment holds something other than a JSON object (the value itself is
        not repeated in the message). URLs carrying credentials are refused on opening.
    """
    url = str(url)
    if "://" not in url:
        return None
    if given:
        return dict(given)
    text = os.environ.get(STORAGE_OPTIONS_ENV, "").strip()
    if not text:
        return None
    where = f"${STORAGE_OPTIONS_ENV}"
    if text.startswith("@"):
        where = f"storage options file {text[1:]}"
        try:
            with open(text[1:], encoding="utf-8") as fh:
                text = fh.read()
        except OSError as exc:
            raise InputError(problem(where, "a readable JSON file", type(exc).__name__,
                                     "Check the path after '@'.")) from None
    try:
        options = json.loads(text)
    except json.JSONDecodeError:
        options = None
    if not isinstance(options, dict):
        raise InputError(problem(where, "a JSON object of fsspec storage options",
                                 "something else (value not shown: it may hold secrets)",
                                 'Set it to e.g. {"client_kwargs": {"endpoint_url": "..."}}.'))
    return options


def _local_dir(url: str) -> str | None:
    """The directory of a local path or ``file://`` URL; None for any other URL."""
    if url.startswith("file://"):
        return url[len("file://"):]
    return None if "://" in url else url


def _store(url: str, mode: str) -> Any:
    """What Zarr opens for a workspace URL: a local directory (path or ``file://``) through
    the store that keeps every key inside it (:class:`._safety.ContainedLocalStore`), any
    other URL as it is."""
    directory = _local_dir(url)
    if directory is None:
        return url
    from zarr.core.sync import sync

    try:
        return sync(ContainedLocalStore.open(directory, mode=mode))
    except OSError as exc:  # creating the directory on a read-only mount
        if unwritable(exc):
            raise not_writable(f"workspace {url}", exc) from exc
        raise


def _open_array(url: str, path: str, storage_options: dict | None) -> zarr.Array:
    storage_options = resolve_storage_options(url, storage_options)
    kwargs = {"storage_options": storage_options} if storage_options and "://" in str(url) else {}
    _check_linked_metadata(str(url), str(path), storage_options)
    try:
        node = zarr.open(store=url, path=path or None, mode="r", **kwargs)
    except Exception as exc:  # zarr raises several kinds for a missing or foreign node
        raise NotFound(problem(f"{url}:{path}", "a readable Zarr array", f"{type(exc).__name__}: {exc}",
                               "Check the URL, the array path and the credentials.")) from exc
    if not isinstance(node, zarr.Array):
        raise InputError(problem(f"{url}:{path}", "a Zarr array", "a group",
                                 "Give the path of the array inside the store."))
    _check_safe(node, f"linked array {url}:{path}")
    return node


def _is_empty_place(url: str, storage_options: dict | None) -> bool:
    if "://" not in url:
        return not os.path.exists(url) or not os.listdir(url)
    import fsspec

    fs, path = fsspec.core.url_to_fs(url, **(storage_options or {}))
    try:
        return not fs.exists(path) or not fs.ls(path)
    except FileNotFoundError:
        return True


def _plain(value: Any) -> Any:
    """Deep-convert to plain JSON types (a numpy scalar would poison Zarr attributes)."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    return value


class _Digest:
    """Streaming, appendable fingerprint of an array's rows.

    Rows are hashed in blocks of a fixed row count (about 4 MiB, set by the row shape and
    dtype only), and the fingerprint is the SHA-256 of the row shape, the dtype, the row
    count and the block digests. So it follows the content and not the Zarr chunking, and
    after an append only the partial last block has to be read again.

    Parameters
    ----------
    tail : tuple of int
        Shape of one row.
    dtype : numpy dtype
    blocks : list of str, optional
        Digests of the full blocks already hashed (from :attr:`blocks` of an earlier run).
    """

    def __init__(self, tail: tuple[int, ...], dtype: np.dtype, blocks: list[str] | None = None):
        self._header = f"{tuple(int(t) for t in tail)}|{np.dtype(dtype).str}"
        row_bytes = int(np.prod(tail)) * np.dtype(dtype).itemsize
        self.block_rows = max(1, _DIGEST_BLOCK_BYTES // max(row_bytes, 1))
        self.blocks = list(blocks or [])
        self.rows = len(self.blocks) * self.block_rows
        self._partial = hashlib.sha256()

    def update(self, rows: np.ndarray) -> None:
        """Hash the next rows (ndarray of shape (m, *tail)), in order."""
        start = 0
        while start < rows.shape[0]:
            room = self.block_rows - self.rows % self.block_rows
            piece = np.ascontiguousarray(rows[start : start + room])
            self._partial.update(piece.tobytes())
            self.rows += piece.shape[0]
            start += piece.shape[0]
            if self.rows % self.block_rows == 0:
                self.blocks.append(self._partial.hexdigest()[:16])
                self._partial = hashlib.sha256()

    def update_from(self, arr: Any, n_rows: int) -> None:
        """Hash rows ``self.rows … n_rows`` of ``arr`` (resuming after stored blocks)."""
        for start in range(self.rows, n_rows, self.block_rows):
            self.update(np.asarray(arr[start : min(n_rows, start + self.block_rows)]))

    def hexdigest(self) -> str:
        """16 hex digits identifying every row hashed so far."""
        h = hashlib.sha256(f"{self._header}|{self.rows}".encode())
        for block in self.blocks:
            h.update(block.encode())
        if self.rows % self.block_rows:
            h.update(self._partial.hexdigest()[:16].encode())
        return h.hexdigest()[:16]


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
