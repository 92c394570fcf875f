"""Options the user left out, chosen from the records' shape, once per stage run.

The patch size, stride, atoms, the coder's nonzeros, the preprocessing and the training
sample have no value that suits every archive: a 40-sample signal and a 256 × 256 image
need different ones. Their declarations default to ``None`` ("chosen from the records'
shape"), and :func:`resolve` fills every such value from
:func:`~atomline.stages.kernels.shape_rules.default_settings` for the records' shape and
count, then refuses (:func:`~atomline.stages.kernels.shape_rules.check_settings`) a
configuration that cannot work, before anything is read. Values the user gave always win.
Each chosen value comes with a sentence saying why, which the train manifest, the
dictionary's attributes and the nightly report carry.

Pooling regions are chosen when the dictionary is pooled (:func:`pool_regions`), within the
patch grid the dictionary was trained with.

Rank-1 records are signals unless they were stored as vectors
(``Workspace.add_records(..., kind="vectors")``, ``atomline add-records --vectors``):
the shape alone cannot tell the two apart, and cutting a feature table into windows would
be meaningless.
"""

from __future__ import annotations

import dataclasses
from typing import Any

from .kernels import coding
from .kernels._records import keyword_options
from .kernels.learning import takes_coder
from .kernels.shape_rules import check_settings, geometry_defaults
from .options import TrainOptions
from .recipes import recipe_for, with_recipe

__all__ = ["resolve", "resolve_shape", "pool_regions", "SHAPE_DEFAULTED"]

#: Train options whose default is "chosen from the records' shape".
SHAPE_DEFAULTED = ("patch_size", "stride", "n_atoms", "n_nonzero", "sample_patches",
                   "preprocessing")


def resolve(ws: Any, records: str, options: TrainOptions) -> tuple[TrainOptions, dict]:
    """Fill the train options the user left out from the shape of ``data/<records>``.

    Only the workspace's metadata is read (shape, count, record kind), so the preflight can
    call it too.

    Parameters
    ----------
    ws : Workspace
    records : str
        Name of the records array.
    options : TrainOptions
        ``None`` in a field of :data:`SHAPE_DEFAULTED` means "chosen from the records' shape";
        ``n_nonzero`` is chosen when the learner's coder takes it and ``coder_options`` lacks it.

    Returns
    -------
    options : TrainOptions
        Every shape-defaulted field set (``patch_size``/``stride`` stay ``None`` for vectors:
        the whole record is one patch).
    chosen : dict
        ``kind`` ("vectors", "signals" or "images"), ``regions`` (the pooling default for
        this geometry, list of int per spatial axis) and ``reasons`` (one sentence per value,
        for users; a given value's says it was given), plain JSON; with a recipe stored
        for these records (:mod:`~atomline.stages.recipes`, used for the values not
        given), ``recipe`` (its id) and the recipe's ``regions``.

    Raises
    ------
    InputError
        A configuration that cannot work, naming the value to change and what to.
    """
    arr = ws.records(records)
    # A search's stored winner sits between the options given and the shape defaults.
    applied = recipe_for(ws, records)
    resolved, chosen = resolve_shape(tuple(arr.shape[1:]), int(arr.shape[0]),
                                     with_recipe(options, applied),
                                     vectors=ws.records_kind(records) == "vectors")
    if applied is not None:
        chosen["recipe"] = applied["id"]
        chosen["regions"] = list(applied["configuration"]["regions"])
        chosen["reasons"]["recipe"] = (f"Values not given come from the recipe "
                                       f"{applied['name']!r} (search "
                                       f"{applied['source']['search_id']}).")
    return resolved, chosen


def resolve_shape(record_shape: tuple[int, ...], n_records: int, options: TrainOptions, *,
                  vectors: bool = False) -> tuple[TrainOptions, dict]:
    """:func:`resolve` for a known shape and count (see there)."""
    given: dict[str, Any] = {}
    for name in ("patch_size", "stride", "n_atoms", "sample_patches"):
        if getattr(options, name) is not None:
            given[name] = getattr(options, name)
    if options.patch_size is not None and options.stride is None:
        # A given patch size keeps its documented stride: the patch size (patches side by side).
        given["stride"] = options.patch_size
    coder_options = dict(options.coder_options or {})
    sets_nonzero = takes_coder(options.method) and "n_nonzero" in keyword_options(
        coding.METHODS[options.coder].run)
    if sets_nonzero and "n_nonzero" in coder_options:
        given["n_nonzero"] = coder_options["n_nonzero"]
    # The geometry alone first (everything else at its least), then the values that follow it.
    geometry = {name: given[name] for name in ("patch_size", "stride") if name in given}
    first = check_settings(record_shape, n_records, vectors=vectors, regions=1, n_atoms=1,
                           n_nonzero=1, sample_patches=1, normalise=False, **geometry)
    default = check_settings(record_shape, n_records, vectors=vectors)
    derived: dict[str, str] = {}
    if first.kind != "vectors" and "patch_size" in given:
        # Values that follow the geometry are derived from the given one, unless given too.
        values, why = geometry_defaults(first.kind, first.record_shape, first.patch_size,
                                        first.stride, n_records)
        derived = {name: why[name] for name in values if name not in given}
        given.update({name: values[name] for name in derived})
    # Regions belong to pooling: the default, kept within the grid.
    settings = check_settings(record_shape, n_records, vectors=vectors, **given,
                              regions=_within(default.regions, first.grid))
    reasons = {name: settings.reasons[name] for name in
               ("patch_size", "stride", "n_atoms", "sample_patches", "n_nonzero", "normalise",
                "whiten")}
    reasons.update(derived)
    reasons["regions"] = default.reasons["regions"]
    if settings.regions != default.regions:
        reasons["regions"] = (f"{' × '.join(map(str, settings.regions))} pooled part(s): the "
                              f"default {' × '.join(map(str, default.regions))} kept within the "
                              f"{' × '.join(map(str, settings.grid))} patch positions.")
    if options.patch_size is not None and options.stride is None:
        reasons["stride"] = (f"Stride {' × '.join(map(str, settings.stride))}: the given patch "
                             "size, so patches lie side by side.")
    changes: dict[str, Any] = {"patch_size": settings.patch_size, "stride": settings.stride,
                               "n_atoms": settings.n_atoms, "sample_patches": settings.sample_patches}
    if sets_nonzero:
        coder_options.setdefault("n_nonzero", settings.n_nonzero)
        changes["coder_options"] = coder_options
    else:
        reasons.pop("n_nonzero")
    if options.preprocessing is None:
        changes["preprocessing"] = settings.preprocessing()
        reasons["preprocessing"] = f"{reasons['normalise']} {reasons['whiten']}"
    else:
        reasons["preprocessing"] = f"preprocessing = {options.preprocessing} was given."
    del reasons["normalise"], reasons["whiten"]
    return dataclasses.replace(options, **changes), {
        "kind": settings.kind, "regions": list(settings.regions), "reasons": reasons}


def pool_regions(dict_attrs: dict, grid: tuple[int, ...]) -> tuple[tuple[int, ...], str]:
    """Pooling regions for a dictionary when none are given, within its patch grid.

    Parameters
    ----------
    dict_attrs : dict
        The dictionary's attributes; ``settings["regions"]`` is the shape default chosen
        when it was trained (dictionaries stored before shape defaults have none: 4 parts
        per axis, the earlier default).
    grid : tuple of int
        Patch positions per spatial axis of the dictionary's geometry.

    Returns
    -------
    regions : tuple of int
        Parts per axis, each at most the grid's.
    reason : str
    """
    chosen = (dict_attrs.get("settings") or {}).get("regions")
    wanted = tuple(chosen) if chosen else (4,) * len(grid)
    regions = _within(wanted, grid)
    return regions, (f"{' × '.join(map(str, regions))} pooled part(s): the records' shape default "
                     f"{' × '.join(map(str, wanted))}, within the dictionary's "
                     f"{' × '.join(map(str, grid))} patch positions.")


def _within(wanted: tuple[int, ...], grid: tuple[int, ...]) -> tuple[int, ...]:
    if len(wanted) != len(grid):  # vectors: one region
        wanted = (wanted[0],) * len(grid)
    return tuple(max(1, min(w, g)) for w, g in zip(wanted, grid))
