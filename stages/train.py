"""The train stage: learn a dictionary from a sample of an archive's patches.

``train_dictionary(workspace, records, ...)`` draws a seeded uniform sample of records,
cuts them into patches, fits the preprocessing, runs a learner, and stores the result under
``dictionaries/<id>``. The id is derived from everything the dictionary is made from
(data fingerprint, geometry, learner, coder, seed), so a rerun with the same inputs finds
the finished dictionary instead of training again.

``train_task`` is the same function as a Prefect task.
"""

from __future__ import annotations

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE

from .checks import check_sample_size
from .kernels.features import sample_patches
from .kernels.learning import TRAIN_OWN_OPTIONS, check_learner_options, learn, takes_coder
from .kernels.prep import Normaliser, PatchGeometry
from .options import TrainOptions
from .settings import resolve
from .workspace import Workspace, fingerprint_params, open_workspace

__all__ = ["train_dictionary", "train_task", "train_encoder", "train_encoder_task"]


def train_dictionary(
    workspace: Workspace | str,
    records: str,
    options: TrainOptions = TrainOptions(),
    *,
    dict_id: str | None = None,
    run: str | None = None,
    break_lease: bool = False,
) -> dict:
    """Train a dictionary on a sample of ``data/<records>`` and store it.

    Parameters
    ----------
    workspace : Workspace or str
        The workspace or its URL.
    records : str
        Name of the records array.
    options : TrainOptions
        Atoms, patch geometry, learner and its coder, preprocessing, sample size and seed
        (see :class:`~atomline.stages.options.TrainOptions` for each one's meaning). Values
        left ``None`` are chosen from the records' shape (:func:`~atomline.stages.settings.resolve`)
        before anything is read; a configuration that cannot work is refused then.
    dict_id : str, optional
        Id to store under; derived from the inputs by default.
    run : str, optional
        Name of this run, shown to another run refused by the dictionary's write lease.
    break_lease : bool
        Take the dictionary's write lease even if another run holds it.

    Returns
    -------
    dict
        Manifest: ``dict_id``, ``reused`` (True when an identical dictionary existed),
        ``n_atoms``, ``n_features``, ``sample_patches``, ``diagnostics`` summary, and
        ``settings`` (``kind``, the pooling ``regions`` default and one ``reasons``
        sentence per value chosen from the shape or given).
    """
    ws = open_workspace(workspace)
    arr = ws.records(records)
    options, chosen = resolve(ws, records, options)
    n_atoms, method, coder, seed = options.n_atoms, options.method, options.coder, options.seed
    sample_patches, preprocessing = options.sample_patches, options.preprocessing
    geometry = PatchGeometry.for_records(arr.shape[1:], options.patch_size, options.stride)
    coder_options = options.train_coder_options
    learner_options = dict(options.learner_options or {})
    coder_kw = {"coder": coder, "coder_options": coder_options} if takes_coder(method) else {}
    normaliser = Normaliser(**(preprocessing or {}))
    check_sample_size(sample_patches, n_atoms)
    check_learner_options(method, learner_options, TRAIN_OWN_OPTIONS)
    recipe = {
        "records_fingerprint": ws.records_fingerprint(records),
        "geometry": geometry.to_attrs(),
        "n_atoms": int(n_atoms),
        "method": method,
        "coder": coder if takes_coder(method) else None,
        "coder_options": coder_options if takes_coder(method) else None,
        "learner_options": learner_options,
        "preprocessing": normaliser.to_attrs(),
        "sample_patches": int(sample_patches),
        "seed": int(seed),
    }
    dict_id = dict_id or f"d-{fingerprint_params(recipe)[:12]}"
    if ws.has_dictionary(dict_id):
        stored = ws.load_dictionary(dict_id)
        return _manifest(stored.attrs, dict_id, reused=True, chosen=chosen)

    # One run trains a given dictionary at a time; a second one is refused, naming the first.
    with ws.lease(f"dictionaries/{dict_id}", run=run, break_existing=break_lease) as held:
        if ws.has_dictionary(dict_id):  # finished by another run just before we took the lease
            return _manifest(ws.load_dictionary(dict_id).attrs, dict_id, reused=True, chosen=chosen)
        sample = _sample(ws, records, arr, geometry, sample_patches, seed)
        # Checkpoints live in the workspace: a killed run resumes from the last one and
        # ends with the same atoms as an uninterrupted run.
        learned = learn(
            sample, n_atoms, method, preprocessing=normaliser, seed=seed,
            checkpoint=lambda state: _save_checkpoint(ws, held, dict_id, state),
            resume=ws.load_checkpoint(dict_id), **coder_kw, **learner_options,
        )
        attrs = dict(
            recipe,
            coder=learned.params.get("coder", coder),
            coder_options=learned.params.get("coder_options", coder_options),
            records=records,
            n_features=geometry.n_features,
            preprocessing=learned.preprocessing.to_attrs(),
            params=learned.params,
            diagnostics=learned.diagnostics,
            settings=chosen,
            **({"search_recipe": chosen["recipe"]} if "recipe" in chosen else {}),
        )
        held.check()  # a run that lost its lease stores nothing
        stored = ws.save_dictionary(dict_id, learned.atoms, attrs, learned.preprocessing.arrays())
    return _manifest(stored.attrs, dict_id, reused=False, chosen=chosen)


def _sample(ws: Workspace, records: str, arr, geometry: PatchGeometry, n_patches: int,
            seed: int) -> np.ndarray:
    """ndarray of shape (n_patches, d), float64: a seeded sample of the records' patches,
    reading (and checking) only the chunks that hold chosen records."""
    return sample_patches(arr.shape[0], geometry, n_patches, seed, chunk_rows=arr.chunks[0],
                          read=lambda c: ws.read_chunk(records, c, arr))


def _save_checkpoint(ws: Workspace, held, dict_id: str, state: dict) -> None:
    """Store a learner checkpoint, only while the dictionary's lease is still this run's."""
    held.check()
    ws.save_checkpoint(dict_id, state)


def _manifest(attrs: dict, dict_id: str, reused: bool, chosen: dict) -> dict:
    diag = attrs.get("diagnostics", {})
    objective = diag.get("objective") or [None]
    return {
        "dict_id": dict_id,
        "reused": reused,
        "method": attrs["method"],
        "n_atoms": attrs["n_atoms"],
        "n_features": attrs["n_features"],
        "sample_patches": attrs["sample_patches"],
        "coherence": diag.get("coherence"),
        "final_objective": objective[-1],
        "geometry": attrs["geometry"],
        "settings": chosen,
    }


def train_encoder(
    workspace: Workspace | str,
    records: str,
    dict_id: str,
    *,
    name: str = "learned",
    target: str = "fista",
    target_options: dict | None = None,
    n_layers: int = 3,
    sample_patches: int = 5_000,
    seed: int = 0,
    fit_options: dict | None = None,
) -> dict:
    """Train a learned fast encoder (unrolled ISTA) for a stored dictionary.

    The encoder learns to reproduce the ``target`` coder's codes on a sample of the
    records' patches, preprocessed like the dictionary's training rows, and is stored
    beside the dictionary. The encode stage then uses it with ``coder="learned"`` and
    ``coder_options={"encoder": name}``.

    Parameters
    ----------
    workspace : Workspace or str
    records : str
    dict_id : str
    name : str
        Name of the encoder under ``dictionaries/<dict_id>/encoders``.
    target : str
        The coder to imitate (e.g. ``"fista"``, ``"omp"``).
    target_options : dict, optional
        Its options (e.g. ``{"lam": 0.5}``).
    n_layers : int
    sample_patches : int
    seed : int
    fit_options : dict, optional
        Training options of :func:`~atomline.stages.kernels.coding.fit_learned_encoder`.

    Returns
    -------
    dict
        ``{"dict_id", "name", "fingerprint", "target", "n_layers", "info"}``
    """
    from .kernels.coding import fit_learned_encoder

    ws = open_workspace(workspace)
    arr = ws.records(records)
    stored = ws.load_dictionary(dict_id)
    geometry, normaliser = stored.geometry(), stored.normaliser()
    sample = normaliser.apply(_sample(ws, records, arr, geometry, sample_patches, seed))
    encoder = fit_learned_encoder(sample, stored.atoms, target, n_layers, seed=seed,
                                  **(fit_options or {}), **(target_options or {}))
    fingerprint = ws.save_encoder(dict_id, name, encoder.arrays(), {"encoder": encoder.attrs()})
    return {"dict_id": dict_id, "name": name, "fingerprint": fingerprint, "target": target,
            "n_layers": n_layers, "info": encoder.attrs().get("info")}


#: The train stage as a Prefect task (no result caching: arguments are names only).
train_task = task(train_dictionary, name="train-dictionary", cache_policy=NO_CACHE)

#: Encoder training as a Prefect task.
train_encoder_task = task(train_encoder, name="train-encoder", cache_policy=NO_CACHE)
