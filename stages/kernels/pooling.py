"""Pooling of sparse codes into one fixed-length feature vector per record.

The patch grid of a record (see :class:`~atomline.stages.kernels.prep.PatchGeometry`) is cut into
``regions`` equal parts — segments of a 1-D record, a grid of rectangles of an image — and
within each region every atom's coefficients are reduced to one number:

* ``reduce="max"``: the largest magnitude, ``max |z|``;
* ``reduce="mean"``: the mean magnitude, ``mean |z|``.

With ``split_sign=True`` the positive and negative parts ``max(0, z)`` and ``max(0, −z)``
are pooled separately (so a feature says which polarity an atom appeared with). The
feature vector of a record has ``F = (2 if split_sign else 1) × R × k`` entries, ordered
sign-major, then region, then atom.

Pure numpy over in-memory arrays; the pool stage (:mod:`atomline.stages.pool`) reads the
codes and writes what :func:`pool_codes` returns.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError, problem

__all__ = ["REDUCTIONS", "check_reduce", "check_regions", "region_of_patches", "pool_codes",
           "n_pooled"]

REDUCTIONS = ("max", "mean")


def check_reduce(reduce: str) -> None:
    """Refuse a reduction that is not one of :data:`REDUCTIONS`."""
    if reduce not in REDUCTIONS:
        raise InputError(problem("reduce", f"one of {REDUCTIONS}", repr(reduce),
                                 "Pick a listed reduction."))


def check_regions(grid: tuple[int, ...], regions: int | tuple[int, ...]) -> tuple[int, ...]:
    """Parts per axis of a patch grid for pooling; each between 1 and the grid's extent.

    Parameters
    ----------
    grid : tuple of int
        Patch positions per spatial axis.
    regions : int or tuple of int
        Equal parts per axis; an int is used on every axis.

    Returns
    -------
    tuple of int
        The parts per axis.
    """
    parts = (regions,) * len(grid) if isinstance(regions, (int, np.integer)) else tuple(regions)
    if len(parts) != len(grid) or any(not 1 <= r <= g for r, g in zip(parts, grid)):
        raise InputError(problem("regions", f"1..{list(grid)} parts per axis ({len(grid)} axes)",
                                 str(regions), "Use fewer regions than patch positions."))
    return parts


def region_of_patches(grid: tuple[int, ...], regions: int | tuple[int, ...]) -> tuple[np.ndarray, int]:
    """Assign every patch position of a grid to a region.

    Parameters
    ----------
    grid : tuple of int
        Patch positions per spatial axis (``PatchGeometry.grid``).
    regions : int or tuple of int
        Equal parts per axis; an int is used on every axis.

    Returns
    -------
    region : ndarray of shape (P,), int64
        Region number of each patch, in the raster order of the grid.
    n_regions : int
        ``R``, the product of the parts per axis.
    """
    parts = check_regions(grid, regions)
    per_axis = [(np.arange(g) * r) // g for g, r in zip(grid, parts)]
    region = np.zeros(grid, dtype=np.int64)
    for axis, ids in enumerate(per_axis):
        shape = [1] * len(grid)
        shape[axis] = grid[axis]
        region = region * parts[axis] + ids.reshape(shape)
    return region.reshape(-1), int(np.prod(parts))


def n_pooled(n_outputs: int, n_regions: int, split_sign: bool) -> int:
    """``F``, the length of a record's feature vector: ``(2 if split_sign else 1) × R × k``.

    Parameters
    ----------
    n_outputs : int
        ``k``, code outputs per patch (atoms; ``2k`` for split-sign thresholding).
    n_regions : int
        ``R``.
    split_sign : bool
    """
    return (2 if split_sign else 1) * int(n_regions) * int(n_outputs)


def pool_codes(
    index: np.ndarray,
    value: np.ndarray,
    *,
    n_atoms: int,
    patch_region: np.ndarray,
    n_regions: int,
    reduce: str = "max",
    split_sign: bool = True,
) -> np.ndarray:
    """Pool the sparse codes of whole records.

    Parameters
    ----------
    index : ndarray of shape (n_records * P, q), int
        Atom numbers, ``-1`` in unused slots.
    value : ndarray of shape (n_records * P, q), float
    n_atoms : int
        ``k``.
    patch_region : ndarray of shape (P,), int
        Region of each patch position (from :func:`region_of_patches`).
    n_regions : int
        ``R``.
    reduce : {"max", "mean"}
    split_sign : bool

    Returns
    -------
    ndarray of shape (n_records, F), float32
        ``F = (2 if split_sign else 1) * R * k``.
    """
    check_reduce(reduce)
    P = patch_region.shape[0]
    n_records = index.shape[0] // P
    q = index.shape[1]
    used = index >= 0
    row = np.repeat(np.arange(index.shape[0]), q).reshape(index.shape)
    record, pos = row // P, row % P
    cell = (record * n_regions + patch_region[pos]) * n_atoms + index  # (rec, region, atom)
    cell, v = cell[used], value[used].astype(np.float64)
    parts = [np.maximum(v, 0), np.maximum(-v, 0)] if split_sign else [np.abs(v)]
    size = n_records * n_regions * n_atoms
    pooled = []
    for part in parts:
        acc = np.zeros(size)
        if reduce == "max":
            np.maximum.at(acc, cell, part)  # every value is ≥ 0, so 0 is a neutral start
        else:
            np.add.at(acc, cell, part)
            patches_in_region = np.bincount(patch_region, minlength=n_regions)
            acc = (acc.reshape(n_records, n_regions, n_atoms)
                   / patches_in_region[None, :, None]).reshape(-1)
        pooled.append(acc.reshape(n_records, n_regions * n_atoms))
    return np.concatenate(pooled, axis=1).astype(np.float32)
