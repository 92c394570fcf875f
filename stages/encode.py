"""The encode stage: sparse-code every patch of every record, chunk by chunk.

Two steps, so that a flow can spread the work:

* :func:`prepare_encode` creates (or reopens, to resume) ``codes/<dict-id>/<records>``
  with one output chunk per input row chunk, and returns the chunks still to do;
* :func:`encode_chunks` codes a batch of those chunks; many batches run in parallel,
  each owning its chunks, and each chunk is written data first, done flag last.

The codes of record ``i`` are rows ``i·P … (i+1)·P − 1`` (``P`` patches per record) of
``index`` (int32), ``value`` (float32) and ``count`` (int32).

``encode_task`` is :func:`encode_chunks` as a Prefect task.
"""

from __future__ import annotations

import time

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE
from threadpoolctl import threadpool_limits

from .checks import check_record_shape, resolve_coder
from .kernels.coding import code, code_outputs, code_width
from .errors import BadChunk, FingerprintMismatch, InputError, problem, retry_if_transient
from .options import EncodeOptions
from .workspace import Workspace, fingerprint_params, iter_row_chunks, open_workspace

__all__ = ["prepare_encode", "encode_chunks", "encode_task", "codes_path"]


def codes_path(dict_id: str, records: str) -> str:
    """Workspace path of the codes of ``records`` under dictionary ``dict_id``."""
    return f"codes/{dict_id}/{records}"


def prepare_encode(
    workspace: Workspace | str,
    records: str,
    dict_id: str,
    options: EncodeOptions = EncodeOptions(),
    *,
    overwrite: bool = False,
) -> dict:
    """Create or reopen the codes output and list the chunks left to encode.

    Parameters
    ----------
    workspace : Workspace or str
    records : str
        Name of the records array.
    dict_id : str
        A complete dictionary of the workspace.
    options : EncodeOptions
        ``coder``: by default the one the dictionary was trained with; ``coder_options``:
        with the dictionary's own coder they are merged into the training ones (each given
        option replaces only the one of its name); with another coder they are all the
        options. Unknown option names are refused, naming the known ones.
    overwrite : bool
        Replace codes made from other inputs or parameters.

    Returns
    -------
    dict
        ``{"output", "n_chunks", "pending", "coder", "coder_options", "width"}``
    """
    ws = open_workspace(workspace)
    arr = ws.records(records)
    stored = ws.load_dictionary(dict_id)
    geometry = stored.geometry()
    check_record_shape(dict_id, geometry.record_shape, records, arr.shape[1:])
    coder, coder_options = resolve_coder(stored.attrs, options.coder, options.coder_options)
    resolved = runnable_coder_options(ws, dict_id, coder, coder_options)
    width = code_width(coder, stored.atoms.shape[0], **resolved)
    P = geometry.patches_per_record
    params = {"coder": coder, "coder_options": coder_options}
    if coder == "learned":  # the codes depend on the stored encoder's content too
        params["encoder_fingerprint"] = ws.load_encoder(dict_id, coder_options["encoder"])[0]["fingerprint"]
    attrs = {
        "records": records,
        "dict_id": dict_id,
        "records_fingerprint": ws.records_fingerprint(records),  # of the rows covered now
        "dictionary_fingerprint": stored.fingerprint,
        "params": params,
        "patches_per_record": P,
        "record_chunk_rows": int(arr.chunks[0]),
        "geometry": geometry.to_attrs(),
        "n_atoms": code_outputs(coder, stored.atoms.shape[0], **resolved),
        "width": width,
    }
    # The records' content is not in the fingerprint but in ``covers``: codes made before
    # rows were appended are grown and only the new chunks encoded (Workspace.create_output).
    attrs["fingerprint"] = fingerprint_params(
        {k: attrs[k] for k in ("records", "dictionary_fingerprint", "params", "record_chunk_rows")}
    )
    out = ws.create_output(
        codes_path(dict_id, records),
        n_rows=arr.shape[0] * P,
        chunk_rows=int(arr.chunks[0]) * P,
        arrays={"index": ((width,), "int32"), "value": ((width,), "float32"),
                "count": ((), "int32")},
        attrs=attrs,
        overwrite=overwrite,
        covers={"records": records, "rows": int(arr.shape[0]),
                "fingerprint": ws.records_fingerprint(records)},
    )
    skipped = out.record_skips(int(arr.chunks[0]), int(arr.shape[0]))
    return {"output": codes_path(dict_id, records), "n_chunks": out.n_chunks,
            "pending": out.pending(), "coder": coder, "coder_options": coder_options,
            "width": width, "skipped_rows": skipped["n_rows"]}


def encode_chunks(
    workspace: Workspace | str,
    records: str,
    dict_id: str,
    chunks: list[int],
    options: EncodeOptions = EncodeOptions(),
    *,
    blas_threads: int | None = None,
    storage_options: dict | None = None,
    lease: str | None = None,
) -> dict:
    """Encode a batch of row chunks into the prepared codes output.

    Chunks already marked done are skipped, so a retried or rerun batch resumes.

    Parameters
    ----------
    workspace : Workspace or str
    records : str
    dict_id : str
    chunks : list of int
        Row-chunk numbers of the records array (each owned by this call alone).
    options : EncodeOptions
        Only ``on_bad_chunk`` is read here: the coder and its options are the prepared
        output's (:func:`prepare_encode`).
    blas_threads : int, optional
        Limit BLAS threads while coding (so workers × threads stay within the cores).
    storage_options : dict, optional
        For opening ``workspace`` when it is a URL.
    options.on_bad_chunk : {"stop", "skip"}
        What to do with a missing or unreadable input chunk: raise
        :class:`~atomline.stages.errors.BadChunk` naming it, or mark its output chunk
        skipped (flag 2, fill values) and go on; the skipped rows are listed in the
        output's ``skipped`` attribute by the next :func:`prepare_encode` or flow.
    lease : str, optional
        Token of the codes output's write lease held by the calling run (the flows pass
        it): each chunk is committed only while that lease is still the run's, else
        :class:`~atomline.stages.errors.LeaseLost` (see :meth:`Workspace.output`).

    Returns
    -------
    dict
        ``{"encoded": chunks done now, "skipped": chunks already done, "bad": chunks
        skipped now for bad input, "records": records coded, "patches": patches coded,
        "seconds": wall time}``
    """
    on_bad_chunk = options.on_bad_chunk  # checked when the options were made
    start = time.perf_counter()
    ws = open_workspace(workspace, storage_options)
    out = ws.output(codes_path(dict_id, records), lease=lease)
    chunks = out.check_chunks(chunks)
    attrs = out.attrs
    arr = ws.records(records)
    stored = ws.load_dictionary(dict_id)
    if stored.fingerprint != attrs["dictionary_fingerprint"]:
        raise FingerprintMismatch(problem(codes_path(dict_id, records),
                               f"dictionary fingerprint {attrs['dictionary_fingerprint']}",
                               stored.fingerprint, "Run prepare_encode with overwrite=True."))
    geometry, normaliser = stored.geometry(), stored.normaliser()
    coder = attrs["params"]["coder"]
    options = runnable_coder_options(ws, dict_id, coder, dict(attrs["params"]["coder_options"]))
    atoms = stored.atoms.astype(arr.dtype)
    P = attrs["patches_per_record"]
    width = attrs["width"]
    encoded = skipped = bad = n_records = 0
    done, _ = out.done_among(chunks)
    with threadpool_limits(limits=blas_threads):
        for c, rows in iter_row_chunks(arr, chunks):
            if c in done:
                skipped += 1
                continue
            try:
                block = ws.read_chunk(records, c, arr)
            except BadChunk as exc:
                if on_bad_chunk == "stop":
                    raise
                out.skip(c, slice(rows.start * P, rows.stop * P), str(exc))
                bad += 1
                continue
            patches = normaliser.apply(geometry.extract(block))
            codes = code(patches, atoms, coder, **options)
            out.commit(c, slice(rows.start * P, rows.stop * P), {
                "index": _pad(codes.index, width, -1).astype(np.int32),
                "value": _pad(codes.value, width, 0).astype(np.float32),
                "count": codes.count.astype(np.int32),
            })
            encoded += 1
            n_records += block.shape[0]
    return {"encoded": encoded, "skipped": skipped, "bad": bad, "records": n_records,
            "patches": n_records * P, "seconds": time.perf_counter() - start}


def runnable_coder_options(ws: Workspace, dict_id: str, coder: str, options: dict) -> dict:
    """Options as :func:`~atomline.stages.kernels.coding.code` takes them: a learned
    encoder is named in the stored options, and loaded here."""
    if coder != "learned":
        return options
    from .kernels.coding import LearnedEncoder

    name = options.get("encoder")
    if not isinstance(name, str):
        raise InputError(problem("coder 'learned'", "option encoder=<name of a stored encoder>",
                                 repr(name), "Train one with train_encoder (atomline train-encoder)."))
    attrs, arrays = ws.load_encoder(dict_id, name)
    return dict(options, encoder=LearnedEncoder.from_stored(attrs["encoder"], arrays))


def _pad(a: np.ndarray, width: int, fill: float) -> np.ndarray:
    """Widen a (rows, q) slot array to ``width`` slots."""
    if a.shape[1] == width:
        return a
    out = np.full((a.shape[0], width), fill, dtype=a.dtype)
    out[:, : a.shape[1]] = a
    return out


#: The encode stage (one batch of chunks) as a Prefect task.
encode_task = task(encode_chunks, name="encode-chunks", cache_policy=NO_CACHE, retries=2,
                  retry_condition_fn=retry_if_transient)
