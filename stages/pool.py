"""The pool stage: one fixed-length feature vector per record from its patches' codes.

The patch grid of a record (see :class:`~atomline.stages.kernels.prep.PatchGeometry`) is cut into
``regions`` equal parts — segments of a 1-D record, a grid of rectangles of an image — and
within each region every atom's coefficients are reduced to one number:

* ``reduce="max"``: the largest magnitude, ``max |z|``;
* ``reduce="mean"``: the mean magnitude, ``mean |z|``.

With ``split_sign=True`` the positive and negative parts ``max(0, z)`` and ``max(0, −z)``
are pooled separately (so a feature says which polarity an atom appeared with). The
feature vector of a record has ``F = (2 if split_sign else 1) × R × k`` entries, ordered
sign-major, then region, then atom.

:func:`pool_codes` is the pure kernel; :func:`prepare_pool` / :func:`pool_chunks` are the
stage, with ``pool_task`` its Prefect task.
"""

from __future__ import annotations

import time

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE

from .checks import check_regions
from .errors import BadChunk, FingerprintMismatch, InputError, problem, retry_if_transient
from .encode import codes_path
from .kernels.prep import PatchGeometry
from .options import REDUCTIONS, PoolOptions
from .workspace import Workspace, fingerprint_params

__all__ = ["pool_codes", "region_of_patches", "prepare_pool", "pool_chunks", "pool_task",
           "features_path"]



def features_path(dict_id: str, records: str) -> str:
    """Workspace path of the pooled features of ``records`` under ``dict_id``."""
    return f"features/{dict_id}/{records}"


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
    if reduce not in REDUCTIONS:
        raise InputError(problem("reduce", f"one of {REDUCTIONS}", repr(reduce),
                                 "Pick a listed reduction."))
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


def prepare_pool(
    workspace: Workspace | str,
    records: str,
    dict_id: str,
    options: PoolOptions = PoolOptions(),
    *,
    overwrite: bool = False,
) -> dict:
    """Create or reopen ``features/<dict-id>/<records>`` and list the chunks left.

    Parameters
    ----------
    workspace : Workspace or str
    records, dict_id : str
        The codes ``codes/<dict_id>/<records>`` must exist (chunks are pooled once encoded).
    options : PoolOptions
        ``reduce`` ({"max", "mean"}), ``split_sign``, ``regions`` (equal parts per
        spatial axis of the patch grid).
    overwrite : bool

    Returns
    -------
    dict
        ``{"output", "n_chunks", "pending", "n_features"}``
    """
    reduce, split_sign, regions = options.reduce, options.split_sign, options.regions
    ws = workspace if isinstance(workspace, Workspace) else Workspace.open(workspace)
    codes = ws.output(codes_path(dict_id, records))
    cattrs = codes.attrs
    geometry = PatchGeometry.from_attrs(cattrs["geometry"])
    _, R = region_of_patches(geometry.grid, regions)
    if reduce not in REDUCTIONS:
        raise InputError(problem("reduce", f"one of {REDUCTIONS}", repr(reduce),
                                 "Pick a listed reduction."))
    params = {"reduce": reduce, "split_sign": bool(split_sign),
              "regions": regions if isinstance(regions, int) else list(regions)}
    F = (2 if split_sign else 1) * R * cattrs["n_atoms"]
    n_records = codes.group["count"].shape[0] // cattrs["patches_per_record"]
    attrs = {"records": records, "dict_id": dict_id, "codes_fingerprint": cattrs["fingerprint"],
             "coder": cattrs["params"]["coder"], "params": params, "n_features": F,
             "n_regions": R}
    attrs["fingerprint"] = fingerprint_params({"codes": cattrs["fingerprint"], "params": params})
    out = ws.create_output(features_path(dict_id, records), n_rows=n_records,
                           chunk_rows=cattrs["record_chunk_rows"],
                           arrays={"values": ((F,), "float32")}, attrs=attrs,
                           overwrite=overwrite, covers=cattrs["covers"])
    skipped = out.record_skips(cattrs["record_chunk_rows"], n_records)
    return {"output": features_path(dict_id, records), "n_chunks": out.n_chunks,
            "pending": out.pending(), "n_features": F, "skipped_rows": skipped["n_rows"]}


def pool_chunks(
    workspace: Workspace | str,
    records: str,
    dict_id: str,
    chunks: list[int],
    options: PoolOptions = PoolOptions(),
    *,
    storage_options: dict | None = None,
    lease: str | None = None,
) -> dict:
    """Pool a batch of chunks whose codes are finished.

    Parameters
    ----------
    workspace : Workspace or str
    records, dict_id : str
    chunks : list of int
        Record-chunk numbers, each owned by this call alone.
    options : PoolOptions
        Only ``on_bad_chunk`` is read here (the pooling is the prepared output's).
    storage_options : dict, optional
    options.on_bad_chunk : {"stop", "skip"}
        What to do with a codes chunk that cannot be decoded: raise
        :class:`~atomline.stages.errors.BadChunk` naming it, or mark the features chunk
        skipped (flag 2) and go on, as :func:`~atomline.stages.encode.encode_chunks` does.
    lease : str, optional
        Token of the features output's write lease held by the calling run (as for
        :func:`~atomline.stages.encode.encode_chunks`).

    Returns
    -------
    dict
        ``{"pooled", "skipped", "bad": chunks skipped now for unreadable codes,
        "records", "seconds"}``
    """
    on_bad_chunk = options.on_bad_chunk  # checked when the options were made
    start = time.perf_counter()
    ws = (workspace if isinstance(workspace, Workspace)
          else Workspace.open(workspace, storage_options=storage_options))
    out = ws.output(features_path(dict_id, records), lease=lease)
    chunks = out.check_chunks(chunks)
    codes = ws.output(codes_path(dict_id, records))
    attrs, cattrs = out.attrs, codes.attrs
    if attrs["codes_fingerprint"] != cattrs["fingerprint"]:
        raise FingerprintMismatch(problem(features_path(dict_id, records),
                                 f"codes with fingerprint {attrs['codes_fingerprint']}",
                                 cattrs["fingerprint"], "Run prepare_pool with overwrite=True."))
    geometry = PatchGeometry.from_attrs(cattrs["geometry"])
    params = attrs["params"]
    region, R = region_of_patches(geometry.grid, params["regions"])
    P, rows_per_chunk = cattrs["patches_per_record"], cattrs["record_chunk_rows"]
    n_records = out.n_rows
    pooled = skipped = unreadable = done_records = 0
    (done, _), (coded, bad) = out.done_among(chunks), codes.done_among(chunks)
    for c in chunks:
        if c in done:
            skipped += 1
            continue
        if c not in coded:
            raise InputError(problem(f"{codes_path(dict_id, records)}, chunk {c}",
                                     "encoded codes", "a chunk not encoded yet",
                                     "Run the encode flow first."))
        rows = slice(c * rows_per_chunk, min(n_records, (c + 1) * rows_per_chunk))
        if c in bad:  # its input chunk was bad: no features either
            out.skip(c, rows, "codes chunk skipped")
            pooled += 1
            continue
        crow = slice(rows.start * P, rows.stop * P)
        try:
            index, value = codes.read("index", crow), codes.read("value", crow)
        except BadChunk as exc:
            if on_bad_chunk == "stop":
                raise
            out.skip(c, rows, str(exc))
            unreadable += 1
            continue
        feats = pool_codes(index, value,
                           n_atoms=cattrs["n_atoms"], patch_region=region, n_regions=R,
                           reduce=params["reduce"], split_sign=params["split_sign"])
        out.commit(c, rows, {"values": feats})
        pooled += 1
        done_records += rows.stop - rows.start
    return {"pooled": pooled, "skipped": skipped, "bad": unreadable, "records": done_records,
            "seconds": time.perf_counter() - start}


#: The pool stage (one batch of chunks) as a Prefect task.
pool_task = task(pool_chunks, name="pool-chunks", cache_policy=NO_CACHE, retries=2,
                retry_condition_fn=retry_if_transient)
