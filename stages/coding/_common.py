"""Shared pieces of the coders: the sparse layout, input validation, the Gram matrix."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError, problem

__all__ = ["SparseCodes", "check_problem", "gram"]


@dataclass(frozen=True)
class SparseCodes:
    """Fixed-width sparse codes of a chunk, the layout the workspace stores.

    Row ``i`` has ``count[i]`` nonzeros, stored in slots ``0 .. count[i] - 1`` of
    ``index[i]`` and ``value[i]``; the remaining slots hold index ``-1`` and value ``0``.

    Attributes
    ----------
    index : ndarray of shape (n_rows, width), int32
        Atom numbers, ``-1`` in unused slots.
    value : ndarray of shape (n_rows, width), float32 or float64
        Coefficients, ``0`` in unused slots.
    count : ndarray of shape (n_rows,), int32
        Number of used slots per row.
    n_atoms : int
        ``k``, the number of atoms of the dictionary the codes refer to.
    """

    index: np.ndarray
    value: np.ndarray
    count: np.ndarray
    n_atoms: int

    @property
    def width(self) -> int:
        """Number of slots per row (``q``)."""
        return int(self.index.shape[1])

    def dense(self) -> np.ndarray:
        """Scatter into a dense array.

        Returns
        -------
        ndarray of shape (n_rows, n_atoms), same dtype as ``value``
        """
        n = self.index.shape[0]
        out = np.zeros((n, self.n_atoms), dtype=self.value.dtype)
        used = self.index >= 0
        rows = np.broadcast_to(np.arange(n)[:, None], self.index.shape)
        # Slots of one row name distinct atoms, so plain assignment is exact.
        out[rows[used], self.index[used]] = self.value[used]
        return out

    @classmethod
    def from_dense(cls, dense: np.ndarray, width: int | None = None) -> "SparseCodes":
        """Pack a dense code array, keeping nonzeros in increasing atom order.

        Parameters
        ----------
        dense : ndarray of shape (n_rows, n_atoms)
        width : int, optional
            Slots per row; defaults to the largest row count. A row with more nonzeros
            than ``width`` is an error.

        Returns
        -------
        SparseCodes
        """
        nz = dense != 0
        count = nz.sum(axis=1).astype(np.int32)
        q = int(count.max(initial=0)) if width is None else int(width)
        if count.max(initial=0) > q:
            raise InputError(
                problem("codes", f"at most {q} nonzeros per row",
                        f"{int(count.max())}", "Raise the width.")
            )
        n, k = dense.shape
        # Stable sort puts each row's nonzero atoms first, in increasing atom order.
        order = np.argsort(~nz, axis=1, kind="stable")[:, :q]
        slot_used = np.arange(q)[None, :] < count[:, None]
        index = np.where(slot_used, order, -1).astype(np.int32)
        value = np.where(slot_used, np.take_along_axis(dense, order, axis=1), 0)
        return cls(index, value.astype(dense.dtype, copy=False), count, k)


def check_problem(X: np.ndarray, atoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Validate a coding problem and bring both arrays to one floating dtype.

    Parameters
    ----------
    X : array_like of shape (n_rows, d)
        Rows to code; float32 or float64.
    atoms : array_like of shape (k, d)
        Dictionary, one atom per row.

    Returns
    -------
    X, atoms : ndarrays, C-contiguous, of the dtype of ``X``

    Raises
    ------
    InputError
        Wrong ranks, mismatched widths, non-floating dtypes, NaN or Inf.
    """
    X = np.asarray(X)
    atoms = np.asarray(atoms)
    for name, arr in (("rows", X), ("atoms", atoms)):
        if arr.ndim != 2:
            raise InputError(problem(name, "a 2-D array", f"shape {arr.shape}",
                                     "Pass rows as (n_rows, d) and atoms as (k, d)."))
        if arr.dtype.kind != "f":
            raise InputError(problem(name, "float32 or float64", f"dtype {arr.dtype}",
                                     "Convert with .astype(np.float32) first."))
    if X.shape[1] != atoms.shape[1]:
        raise InputError(problem("atoms", f"width d = {X.shape[1]} (the rows' width)",
                                 f"atoms of width {atoms.shape[1]}",
                                 "Use the dictionary trained for these patches."))
    if atoms.shape[0] == 0:
        raise InputError(problem("atoms", "at least one atom", "none", "Train a dictionary."))
    for name, arr in (("rows", X), ("atoms", atoms)):
        if not np.isfinite(arr).all():
            bad = int(np.flatnonzero(~np.isfinite(arr).all(axis=1))[0])
            raise InputError(problem(f"{name}, row {bad}", "finite values", "NaN or Inf",
                                     "Clean or drop the row before coding."))
    dtype = X.dtype
    return np.ascontiguousarray(X), np.ascontiguousarray(atoms, dtype=dtype)


def gram(atoms: np.ndarray) -> np.ndarray:
    """The Gram matrix of a dictionary.

    Parameters
    ----------
    atoms : ndarray of shape (k, d)

    Returns
    -------
    ndarray of shape (k, k)
        ``atoms @ atoms.T``.
    """
    return atoms @ atoms.T
