"""What the workspace accepts from its callers: ``.npy`` files, records, labels, atoms,
and the ``on_bad_chunk`` choice. Each check refuses with a message saying what to do."""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from ..errors import InputError, problem

#: What a stage does with an input chunk that is missing or unreadable.
BAD_CHUNK_CHOICES = ("stop", "skip")

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


def _check_atoms(atoms: np.ndarray, where: str, error: type = InputError) -> None:
    """Atoms must be a non-empty (k, d) array of finite floats."""
    if atoms.ndim != 2 or 0 in atoms.shape or atoms.dtype.kind not in "f" or not np.isfinite(atoms).all():
        raise error(problem(f"{where}/atoms", "a non-empty (k, d) array of finite floats",
                            f"shape {atoms.shape}, dtype {atoms.dtype}"
                            + (" with NaN/Inf" if atoms.dtype.kind == "f" and not np.isfinite(atoms).all() else ""),
                            "Train the dictionary again."))
