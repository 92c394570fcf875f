"""Drift: do newly appended records still fit the dictionary as well as the old ones?

For a range of rows, a seeded sample of their patches
(:func:`~atomline.stages.kernels.features.sample_patches`, as the train stage draws its
sample) is normalised like the training patches and coded with the coder the records' codes were made
with (``codes/<dict-id>/<records>``), or the dictionary's own where none exist yet; two
numbers describe how well they fit:

* ``error`` — the mean relative reconstruction error ``‖x − Wᵀz‖² / ‖x‖²`` over patches
  of non-zero norm;
* ``nonzeros`` — the mean number of nonzero coefficients per patch.

:func:`compare_drift` sets the new rows' numbers against a reference range (the rows the
dictionary was trained on): the rows have *drifted* when the error grew by more than
``threshold`` (relative) or the nonzeros moved by more than ``threshold`` (relative).
The nightly flow can retrain only then (``retrain_on_drift``).
"""

from __future__ import annotations

import numpy as np

from .errors import InputError, problem
from .kernels.features import FeatureChain, sample_patches
from .encode import codes_path, runnable_coder_options
from .options import DriftOptions
from .workspace import Workspace, open_workspace

__all__ = ["measure_fit", "compare_drift", "detect_drift"]


def measure_fit(workspace: Workspace | str, records: str, dict_id: str, rows: slice, *,
                max_patches: int = 20_000, seed: int = 0) -> dict:
    """Reconstruction error and nonzeros of a row range under a dictionary.

    Parameters
    ----------
    workspace : Workspace or str
    records, dict_id : str
    rows : slice
        Row range ``start:stop`` of ``data/<records>`` (step 1).
    max_patches : int
        Patches coded at most (a seeded uniform sample of twice the fewest rows that
        hold them); bounds memory and time.
    seed : int

    Returns
    -------
    dict
        ``{"rows": [start, stop], "patches": int, "error": float, "nonzeros": float}``
    """
    ws = open_workspace(workspace)
    arr = ws.records(records)
    start, stop, step = rows.indices(arr.shape[0])
    if step != 1 or stop <= start:
        raise InputError(problem(f"rows of data/{records}", "a non-empty range with step 1",
                                 f"{start}:{stop}:{step}", "Pass e.g. slice(old_count, None)."))
    stored = ws.load_dictionary(dict_id)
    coder, coder_options = stored.coder()
    if ws.has_output(codes_path(dict_id, records)):  # the codes record the coder they used
        params = ws.output(codes_path(dict_id, records)).attrs["params"]
        coder, coder_options = params["coder"], dict(params["coder_options"])
    chain = FeatureChain(stored.geometry(), stored.atoms, coder,
                         runnable_coder_options(ws, dict_id, coder, coder_options), stored.normaliser())
    X = chain.normalise(sample_patches(
        np.arange(start, stop), chain.geometry, max_patches, seed, chunk_rows=arr.chunks[0],
        read=lambda c: ws.read_chunk(records, c, arr)))
    codes = chain.code_patches(X)
    residual = X - codes.dense() @ stored.atoms
    energy = np.einsum("ij,ij->i", X, X)
    keep = energy > 0
    error = np.einsum("ij,ij->i", residual, residual)[keep] / energy[keep]
    nonzeros = np.count_nonzero(codes.dense(), axis=1)
    return {"rows": [start, stop], "patches": int(X.shape[0]),
            "error": float(error.mean()) if error.size else 0.0,
            "nonzeros": float(nonzeros.mean())}


def compare_drift(new: dict, reference: dict, threshold: float = 0.2) -> dict:
    """Decide whether new rows drifted away from the reference rows.

    Parameters
    ----------
    new, reference : dict
        Results of :func:`measure_fit`.
    threshold : float
        Largest relative change tolerated in error and in nonzeros.

    Returns
    -------
    dict
        ``error_change`` and ``nonzeros_change`` (relative, new/reference − 1),
        ``threshold`` and ``drifted`` (bool).
    """
    if threshold < 0:
        raise InputError(problem("drift threshold", "≥ 0", str(threshold), "Use e.g. 0.2."))
    tiny = np.finfo(float).tiny
    error_change = new["error"] / max(reference["error"], tiny) - 1.0
    nonzeros_change = new["nonzeros"] / max(reference["nonzeros"], tiny) - 1.0
    return {"error_change": float(error_change), "nonzeros_change": float(nonzeros_change),
            "threshold": float(threshold),
            "drifted": bool(error_change > threshold or abs(nonzeros_change) > threshold)}


def detect_drift(workspace: Workspace | str, records: str, dict_id: str, options: DriftOptions, *,
                 max_patches: int = 20_000, seed: int = 0) -> dict:
    """Rows ``since:`` (new) against rows ``:since`` (those the dictionary was trained on),
    with ``since`` and ``threshold`` the options' ``drift_since`` and ``drift_threshold``.

    Returns
    -------
    dict
        ``{"reference": measure_fit(...), "new": measure_fit(...), **compare_drift(...)}``
    """
    since, threshold = options.drift_since, options.drift_threshold
    if since is None:
        raise InputError(problem("drift_since", "the first new row", "none",
                                 "Name the first row appended since the dictionary was trained."))
    reference = measure_fit(workspace, records, dict_id, slice(0, since), max_patches=max_patches, seed=seed)
    new = measure_fit(workspace, records, dict_id, slice(since, None), max_patches=max_patches, seed=seed)
    return {"reference": reference, "new": new, **compare_drift(new, reference, threshold)}
