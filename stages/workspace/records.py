"""Records: rows copied into ``data/<name>`` or linked from another store, appended to,
fingerprinted, and read back one checked row chunk at a time."""

from __future__ import annotations

import os

import numpy as np
import zarr

from ._zarr import absent_chunk_keys as _absent_chunk_keys
from .fingerprints import _Digest, _fingerprint_attrs, _recorded_rows
from .inputs import _array_like, check_finite, check_records
from .layout import _LINK_ATTRS, _RECORDS_ATTRS, _check_array_path, _check_name, _check_url
from .outputs import iter_row_chunks
from .safety import require_attrs
from .store import _open_array
from ..errors import AtomlineError, BadChunk, FingerprintMismatch, InputError, LayoutError, problem

_TARGET_CHUNK_BYTES = 4 * 2**20  # ~4 MiB of input per row chunk unless told otherwise


class RecordsMixin:
    """``data/<name>``: add, link, append, open, fingerprint and read records."""

    def add_records(
        self,
        name: str,
        source: np.ndarray | str | os.PathLike,
        *,
        chunk_rows: int | None = None,
        overwrite: bool = False,
        kind: str | None = None,
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
        kind : {"signals", "images", "vectors"}, optional
            What one record is, stored with the records (:meth:`records_kind`). By default
            rank-1 records are signals and rank-2/3 ones images; ``"vectors"`` (rank 1 only)
            says the columns are features, so the stages use each record as one patch.

        Returns
        -------
        dict
            ``{"name", "shape", "dtype", "chunk_rows", "n_chunks", "fingerprint", "kind"}``
        """
        _check_name(name, "records name")
        arr = _array_like(source)
        check_records(arr, f"records {name!r}")
        if kind is not None:
            _record_kind(kind, arr.shape[1:], name)  # refused before anything is written
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
        if kind is not None:  # only a given kind is stored: others follow the rank
            z.attrs["kind"] = kind
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
                "fingerprint": self.records_fingerprint(name), "kind": self.records_kind(name)}

    def records_kind(self, name: str) -> str:
        """What one record of ``data/<name>`` is: ``"vectors"``, ``"signals"`` or ``"images"``
        (as stored by :meth:`add_records`; records stored without a kind follow their rank)."""
        arr = self.records(name)
        return arr.attrs.get("kind") or _record_kind(None, arr.shape[1:], name)


#: What one record can be (see ``Workspace.add_records``).
RECORD_KINDS = ("signals", "images", "vectors")


def _record_kind(kind: str | None, record_shape: tuple[int, ...], name: str) -> str:
    """The kind of records shaped ``record_shape``: the given one if it fits, else by rank."""
    by_rank = "signals" if len(record_shape) == 1 else "images"
    if kind is None:
        return by_rank
    if kind not in RECORD_KINDS:
        raise InputError(problem(f"records {name!r}: kind", f"one of {RECORD_KINDS}", repr(kind),
                                 "Pick a listed kind, or leave it out."))
    if kind != by_rank and not (kind == "vectors" and len(record_shape) == 1):
        raise InputError(problem(f"records {name!r}: kind {kind!r}",
                                 f"records shaped (n, d) for vectors, {by_rank} for this shape",
                                 f"records of shape {tuple(record_shape)}",
                                 f"Leave the kind out (they are {by_rank}), or reshape them."))
    return kind


def _default_chunk_rows(shape: tuple[int, ...], dtype: np.dtype) -> int:
    row_bytes = int(np.prod(shape[1:])) * np.dtype(dtype).itemsize
    return int(max(1, min(shape[0], _TARGET_CHUNK_BYTES // max(row_bytes, 1))))
