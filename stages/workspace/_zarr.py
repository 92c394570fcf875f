"""The one place that reaches into Zarr below its public API.

Zarr's synchronous API has no call for "run this coroutine on your event loop", none
for reading or writing one raw store key, and none for listing a group's stored
children or the keys of a row range's chunks. The workspace needs each (raw metadata is
checked before Zarr parses it; a lease is one raw key; a chunk's arrays are written in
one pass), so they live here, behind small functions, and no other module of atomline
imports ``zarr.core``: a Zarr upgrade that moves them breaks this file only.
"""

from __future__ import annotations

import asyncio
import itertools
from typing import Any, Awaitable, TypeVar

import numpy as np
import zarr
from zarr.core.buffer import default_buffer_prototype
from zarr.core.sync import sync

__all__ = ["run", "read_key", "to_buffer", "child_names", "write_together", "absent_chunk_keys"]

T = TypeVar("T")


def run(coroutine: Awaitable[T]) -> T:
    """Run a coroutine on Zarr's own event loop (the one its stores are bound to)."""
    return sync(coroutine)


def read_key(store: Any, key: str) -> bytes | None:
    """The raw bytes stored under ``key`` of a Zarr store, or ``None`` when absent."""
    buf = sync(store.get(key.lstrip("/"), prototype=default_buffer_prototype()))
    return None if buf is None else buf.to_bytes()


def to_buffer(data: bytes) -> Any:
    """``data`` as the buffer type Zarr stores take in ``set``."""
    return default_buffer_prototype().buffer.from_bytes(data)


def child_names(group: zarr.Group) -> list[str]:
    """Names stored directly under ``group`` (children and metadata documents), unparsed."""
    async def children() -> list[str]:
        return [c async for c in group.store.list_dir(group.path)]

    return sync(children())


def write_together(writes: list[tuple[zarr.Array, slice, np.ndarray]]) -> None:
    """Write several arrays' rows in one pass through Zarr's event loop, all finished on return.

    Each synchronous Zarr call is a round trip through one event-loop thread; writing a
    chunk's arrays concurrently makes it one, and lets their compression overlap.
    """
    async def together():
        await asyncio.gather(*(arr.async_array.setitem(rows, values) for arr, rows, values in writes))

    sync(together())


def absent_chunk_keys(arr: zarr.Array, rows: slice) -> list[str]:
    """Store keys of the stored chunks (or shards) holding ``rows`` that are not there."""
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
