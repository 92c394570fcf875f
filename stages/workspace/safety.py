"""Checks that make reading a store safe; private to :mod:`atomline.stages.workspace`.

Reading a Zarr array runs its codecs on every chunk. A few codecs (``pickle``,
``msgpack2``, ``json2``, the ``vlen-*`` family, ``object`` codecs) rebuild Python objects
from bytes, and unpickling bytes can run any code the bytes ask for. So before any
chunk of an array is decoded, its metadata is checked here: the dtype must be a plain
number type and every codec, filter and compressor must be on a list of codecs that only
compress, shuffle, checksum or rescale numbers. Anything else is refused, whatever the
Zarr format (v2 ``.zarray`` with ``dtype``/``filters``/``compressor``, or v3
``zarr.json`` with ``data_type``/``codecs``, including codecs nested in a shard).

Attributes are plain JSON, so they cannot run code, but a store written by something
else may hold the wrong types; :func:`require_attrs` names the key and the type found.

A workspace in a local directory is opened through :class:`ContainedLocalStore`, which
refuses every read and write of a key whose path resolves outside the workspace's root
(a folder such as ``codes/`` replaced by a symbolic link to elsewhere), and of a key
whose file is itself a symbolic link, even to another valid chunk inside: a chunk is the
bytes stored under its own name, never a pointer to other bytes.
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path
from typing import Any

import numpy as np
import zarr
from zarr.storage import LocalStore

from ._zarr import child_names, read_key

from ..errors import LayoutError, UnsafeStore, not_writable, problem, unwritable

#: Codec names that only move or transform numbers (zarr v3 names, numcodecs ids, and
#: the ``numcodecs.<id>`` names zarr v3 gives numcodecs codecs).
_SAFE_CODECS = frozenset(
    {"bytes", "endian", "transpose", "zstd", "gzip", "blosc", "crc32c", "sharding_indexed"}
    | {f"{prefix}{name}" for prefix in ("", "numcodecs.")
       for name in ("zlib", "gzip", "bz2", "lzma", "lz4", "zstd", "blosc", "shuffle", "delta",
                    "crc32", "crc32c", "adler32", "fletcher32", "jenkins_lookup3",
                    "fixedscaleoffset", "bitround", "quantize", "astype", "packbits")}
)

#: Codecs known to rebuild Python objects from bytes; named as such in the refusal.
_PICKLING = frozenset(
    {f"{prefix}{name}" for prefix in ("", "numcodecs.")
     for name in ("pickle", "msgpack", "msgpack2", "json", "json2", "vlen-utf8", "vlen-bytes",
                  "vlen-array", "vlen_utf8", "vlen_bytes", "vlen_array", "object", "categorize")}
)

#: dtype kinds a workspace array may have: booleans, integers, floats.
_SAFE_KINDS = "biuf"


def check_array_metadata(meta: dict, where: str) -> None:
    """Refuse an array whose metadata allows decoding to run code.

    Parameters
    ----------
    meta : dict
        The array's metadata document as JSON (``ArrayV2Metadata.to_dict()`` or
        ``ArrayV3Metadata.to_dict()``, or the parsed ``.zarray`` / ``zarr.json``).
    where : str
        Name used in the message.

    Raises
    ------
    UnsafeStore
        Object, string or structured dtype; or a codec, filter or compressor that is not
        known to be a plain numeric codec.
    """
    dtype = meta.get("data_type", meta.get("dtype"))
    kind = _dtype_kind(dtype)
    if kind is None or kind not in _SAFE_KINDS:
        raise UnsafeStore(problem(where, "a numeric dtype (bool, integer or float)",
                                  f"dtype {dtype!r}",
                                  "atomline never decodes object or string arrays (they may "
                                  "unpickle code); convert the array to float32."))
    for name in _codec_names(meta):
        if name not in _SAFE_CODECS:
            kind_of = "a pickling codec" if name in _PICKLING else "an unknown codec"
            raise UnsafeStore(problem(where, "numeric codecs only (compression, shuffles, checksums)",
                                      f"{kind_of} {name!r}",
                                      "Rewrite the array with a standard codec such as zstd."))


def _dtype_kind(dtype: Any) -> str | None:
    """numpy kind letter of a v2 (``"<f4"``, ``"|O"``, list of fields) or v3 dtype name."""
    if isinstance(dtype, dict):  # v3 extension data type: {"name": ..., "configuration": ...}
        dtype = dtype.get("name")
    if not isinstance(dtype, str):
        return None  # structured (list of fields) or unreadable
    try:
        return np.dtype(dtype).kind
    except TypeError:
        return None


def _codec_names(meta: dict) -> list[str]:
    """Every codec, filter and compressor name in a v2 or v3 metadata document."""
    names: list[str] = []
    entries = list(meta.get("codecs") or [])
    entries += list(meta.get("filters") or [])
    if meta.get("compressor"):
        entries.append(meta["compressor"])
    while entries:
        entry = entries.pop()
        if isinstance(entry, str):
            names.append(entry)
            continue
        if not isinstance(entry, dict):
            names.append(repr(entry))
            continue
        names.append(str(entry.get("name", entry.get("id"))))
        config = entry.get("configuration") or {}
        if isinstance(config, dict):  # a shard holds codecs of its own
            entries += list(config.get("codecs") or []) + list(config.get("index_codecs") or [])
    return names


def require_attrs(attrs: dict, schema: dict[str, type | tuple[type, ...]], where: str,
                  optional: dict[str, type | tuple[type, ...]] | None = None) -> dict:
    """Check that ``attrs`` has every key of ``schema`` with a value of its type.

    Parameters
    ----------
    attrs : dict
    schema : dict of str to type or tuple of types
        ``type(None)`` in a tuple allows ``null``. ``int`` never accepts ``bool``.
    where : str
    optional : dict of str to type or tuple of types, optional
        Keys that may be absent but, when present, must have that type.

    Returns
    -------
    dict
        ``attrs`` itself.

    Raises
    ------
    LayoutError
    """
    if not isinstance(attrs, dict):
        raise LayoutError(problem(where, "a JSON object of attributes", type(attrs).__name__,
                                  "The store was altered or written by something else."))
    checks = list(schema.items()) + [(k, t) for k, t in (optional or {}).items() if k in attrs]
    for key, types in checks:
        allowed = types if isinstance(types, tuple) else (types,)
        value = attrs.get(key, _MISSING)
        ok = value is not _MISSING and isinstance(value, allowed) and not (
            isinstance(value, bool) and bool not in allowed)
        if not ok:
            found = "no such attribute" if value is _MISSING else f"{type(value).__name__} {value!r}"
            names = " or ".join("null" if t is type(None) else t.__name__ for t in allowed)
            raise LayoutError(problem(f"{where}, attribute {key!r}", names, found[:200],
                                      "The store was altered or written by something else; "
                                      "rebuild this entry with atomline."))
    return attrs


_MISSING = object()

#: zarr's local store writes a key to ``<key>.<uuid4 hex>.partial`` and then renames it.
_UNFINISHED = re.compile(r"\.[0-9a-f]{32}\.partial$")


def unfinished_write(key: str) -> bool:
    """Whether ``key`` names the temporary file of a write that never finished."""
    return _UNFINISHED.search(key) is not None


class ContainedLocalStore(LocalStore):
    """Zarr's local store, refusing keys that resolve outside its root or are links.

    Every read (``get``, ``get_partial_values``, ``exists``, ``getsize``) and write
    (``set``, ``set_if_not_exists``, ``delete``, ``delete_dir``) checks the key first
    (:meth:`contained`); listing is Zarr's own (it does not descend into linked folders),
    except that it hides the temporary files of unfinished writes (:func:`unfinished_write`),
    which a writer killed mid-write leaves behind and readers would list as unknown members.

    Raises
    ------
    UnsafeStore
        From any of those calls, naming the key and where it leads.
    """

    def contained(self, key: str) -> Path:
        """The file of ``key``, after checking it stays inside the root and is no link."""
        path = self.root / key
        root = os.path.realpath(self.root)
        real = os.path.realpath(path)
        if os.path.commonpath([root, real]) != root:
            raise UnsafeStore(problem(f"{key} in workspace {self.root}",
                                      "a path inside the workspace's directory",
                                      f"one leading outside it, to {real}",
                                      "Replace the symbolic link by the real folder (copy the "
                                      "data in), or link a foreign array with link_records."))
        if os.path.islink(path):
            raise UnsafeStore(problem(f"{key} in workspace {self.root}",
                                      "a regular file stored under its own name",
                                      f"a symbolic link to {os.readlink(path)}",
                                      "Replace the link by the file itself (or restore the chunk "
                                      "from its source); atomline never follows links in a workspace."))
        return path

    async def get(self, key, prototype=None, byte_range=None):
        self.contained(key)
        return await super().get(key, prototype, byte_range)

    async def get_partial_values(self, prototype, key_ranges):
        key_ranges = list(key_ranges)
        for key, _ in key_ranges:
            self.contained(key)
        return await super().get_partial_values(prototype, key_ranges)

    async def exists(self, key: str) -> bool:
        self.contained(key)
        return await super().exists(key)

    async def getsize(self, key: str) -> int:
        self.contained(key)
        return await super().getsize(key)

    async def _set(self, key, value, exclusive: bool = False) -> None:
        self.contained(key)
        try:
            await super()._set(key, value, exclusive=exclusive)
        except OSError as exc:
            if unwritable(exc):  # a read-only mount says so, rather than a raw OSError
                raise not_writable(f"{key} in workspace {self.root}", exc) from exc
            raise

    async def delete(self, key: str) -> None:
        self.contained(key)
        try:
            await super().delete(key)
        except OSError as exc:
            if unwritable(exc):
                raise not_writable(f"{key} in workspace {self.root}", exc) from exc
            raise

    async def delete_dir(self, prefix: str) -> None:
        self.contained(prefix.rstrip("/"))
        await super().delete_dir(prefix)

    async def list(self):
        async for key in super().list():
            if not unfinished_write(key):
                yield key

    async def list_prefix(self, prefix: str):
        async for key in super().list_prefix(prefix):
            if not unfinished_write(key):
                yield key

    async def list_dir(self, prefix: str):
        async for key in super().list_dir(prefix):
            if not unfinished_write(key):
                yield key

    def sweep_unfinished_writes(self, prefix: str) -> int:
        """Delete the temporary files of unfinished writes under ``prefix`` (a folder key,
        ``""`` for the root's own files only); call it only while holding the lease that
        makes this process the one writer there. Returns how many were removed."""
        base = self.contained(prefix) if prefix else Path(self.root)
        found = base.glob("**/*.partial" if prefix else "*.partial")
        gone = 0
        for path in found:
            if unfinished_write(path.name) and path.is_file() and not path.is_symlink():
                path.unlink(missing_ok=True)
                gone += 1
        return gone

    def get_sync(self, key, *, prototype=None, byte_range=None):
        self.contained(key)
        return super().get_sync(key, prototype=prototype, byte_range=byte_range)

    def set_sync(self, key, value) -> None:
        self.contained(key)
        super().set_sync(key, value)

    def delete_sync(self, key: str) -> None:
        self.contained(key)
        super().delete_sync(key)


# ---------------------------------------------------------------- raw metadata checks
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
    for name in ("zarr.json", ".zarray"):
        _check_document(read_key(store, f"{path}/{name}"), name, where)


def _check_group_members(group: zarr.Group, where: str) -> None:
    """Check the raw metadata of every child of ``group`` before Zarr opens them."""
    for child in child_names(group):
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

