"""The pool stage: one fixed-length feature vector per record from its patches' codes.

How codes are pooled (regions of the patch grid, ``max``/``mean``, split signs) is the
kernel :mod:`atomline.stages.kernels.pooling`; this stage reads the codes chunk by chunk,
calls :func:`~atomline.stages.kernels.pooling.pool_codes` and writes the features:
:func:`prepare_pool` / :func:`pool_chunks`, with ``pool_task`` its Prefect task.
"""

from __future__ import annotations

import time

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE

from .errors import BadChunk, FingerprintMismatch, InputError, problem, retry_if_transient
from .encode import codes_path
from .kernels.pooling import check_reduce, n_pooled, pool_codes, region_of_patches
from .options import PoolOptions
from .recipes import with_recipe
from .settings import pool_regions
from .workspace.trials import recipes
from .workspace import Workspace, fingerprint_params, open_workspace

__all__ = ["prepare_pool", "pool_chunks", "pool_task", "features_path"]


def features_path(dict_id: str, records: str) -> str:
    """Workspace path of the pooled features of ``records`` under ``dict_id``."""
    return f"features/{dict_id}/{records}"


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
        spatial axis of the patch grid; ``None``: the records' shape default the dictionary
        was trained with, within its grid, :func:`~atomline.stages.settings.pool_regions`);
        for a dictionary trained from a recipe, options left at their defaults take the
        recipe's (:mod:`~atomline.stages.recipes`).
    overwrite : bool

    Returns
    -------
    dict
        ``{"output", "n_chunks", "pending", "n_features", "skipped_rows", "regions",
        "regions_reason"}``
    """
    ws = open_workspace(workspace)
    # A dictionary trained from a recipe is pooled the recipe's way, below the options given.
    made_from = ws.load_dictionary(dict_id).attrs.get("search_recipe")
    if made_from is not None:
        options = with_recipe(options, next(r for r in recipes(ws) if r["id"] == made_from))
    reduce, split_sign, regions = options.reduce, options.split_sign, options.regions
    codes = ws.output(codes_path(dict_id, records))
    cattrs = codes.attrs
    stored = ws.load_dictionary(dict_id)
    geometry = stored.geometry()  # the dictionary's copy is authoritative
    if regions is None:
        regions, reason = pool_regions(stored.attrs, geometry.grid)
    else:
        reason = f"regions = {regions} was given."
    _, R = region_of_patches(geometry.grid, regions)
    check_reduce(reduce)
    params = {"reduce": reduce, "split_sign": bool(split_sign),
              "regions": regions if isinstance(regions, int) else list(regions)}
    F = n_pooled(cattrs["n_atoms"], R, split_sign)
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
            "pending": out.pending(), "n_features": F, "skipped_rows": skipped["n_rows"],
            "regions": params["regions"], "regions_reason": reason}


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
    ws = open_workspace(workspace, storage_options)
    out = ws.output(features_path(dict_id, records), lease=lease)
    chunks = out.check_chunks(chunks)
    codes = ws.output(codes_path(dict_id, records))
    attrs, cattrs = out.attrs, codes.attrs
    if attrs["codes_fingerprint"] != cattrs["fingerprint"]:
        raise FingerprintMismatch(problem(features_path(dict_id, records),
                                 f"codes with fingerprint {attrs['codes_fingerprint']}",
                                 cattrs["fingerprint"], "Run prepare_pool with overwrite=True."))
    geometry = ws.load_dictionary(dict_id).geometry()
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
