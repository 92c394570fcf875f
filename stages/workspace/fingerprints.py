"""Fingerprints: of parameters, and of records (streaming, appendable, chunking-free)."""

from __future__ import annotations

import hashlib
import json
from typing import Any

import numpy as np
import zarr

#: Records are fingerprinted in blocks of about this many bytes, a row count fixed by the
#: row shape and dtype alone, so the fingerprint does not depend on the Zarr chunking and
#: an append re-reads at most one block (the partial last one).
_DIGEST_BLOCK_BYTES = 4 * 2**20


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
