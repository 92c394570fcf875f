"""Settings derived from the records' shape, and the refusal of settings that cannot work.

:func:`default_settings` turns the shape of one record and the number of records into a
complete configuration (patch size, stride, pooling regions, atoms, nonzeros per patch,
preprocessing, training sample size) that is valid for every supported shape, each value
with a one-sentence reason a user can read. :func:`check_settings` takes the same values,
any of them given by the caller, and refuses a configuration that cannot work before any
work is done, naming the value to change and what to change it to.

Record kinds
------------
``vectors``
    ``(d,)`` rows without a spatial axis: the whole record is one patch and one region.
    The shape alone cannot tell a 2,048-sample signal from a 2,048-column feature vector,
    so a rank-1 record is a *signal* unless the caller passes ``vectors=True`` (a silent
    guess would cut a feature table into meaningless windows).
``signals``
    ``(L,)`` rows with one time or frequency axis.
``images``
    ``(H, W)`` or ``(H, W, C)`` rows; patches are square in pixels and span every channel.

Example::

    >>> from atomline.stages.kernels.shape_rules import default_settings
    >>> s = default_settings((150,), 50)
    >>> s.patch_size, s.stride, s.regions, s.n_atoms
    ((19,), (1,), (4,), 38)

The numbers here are rules of thumb of the trade (marked so below), chosen to be safe on
any shape and then checked on public data by ``tests/benchmarks/study_defaults.py``; they
are starting points for a search, not optima.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Any, Mapping

from ..errors import InputError, problem

__all__ = ["Settings", "default_settings", "check_settings", "geometry_defaults", "SETTING_NAMES"]

#: Values a caller may give to :func:`check_settings`.
SETTING_NAMES = ("patch_size", "stride", "regions", "n_atoms", "n_nonzero", "sample_patches",
                 "normalise", "whiten")

# Rules of thumb of the trade, in one place so the study script and the tests see them.
_SIGNAL_PATCH_SHARE = 8      # rule of thumb: a patch spans about 1/8 of a signal ...
_SIGNAL_PATCH_RANGE = (8, 64)  # ... but at least 8 samples (a shape) and at most 64 (cost ∝ d)
_IMAGE_PATCH_SHARE = 8       # rule of thumb: the same share of the shorter image side ...
_IMAGE_PATCH_RANGE = (4, 16)   # ... between 4 and 16 pixels (d = size² × channels)
_SIGNAL_MAX_POSITIONS = 1024  # encoding cost per record ∝ positions: bound it (rule of thumb)
_IMAGE_MAX_POSITIONS = 32     # per image axis, i.e. at most 1,024 patches per image
_SIGNAL_REGIONS = 4          # rule of thumb: 4 pooled parts keep coarse order along a signal
_IMAGE_REGIONS = 3           # and 3 × 3 on an image (features grow with the square)
_OVERCOMPLETE = 2            # rule of thumb: atoms 1-4× the patch dimension; 2× is the middle
_MAX_ATOMS = 512             # features = 2 × regions × atoms; learning cost ∝ atoms × d
_PATCHES_PER_ATOM = 10       # rule of thumb: ≥ 10 training patches per atom for a stable fit
_NONZERO = 5                 # rule of thumb: a handful of nonzeros per patch ...
_NONZERO_SHARE = 4           # ... and at most a quarter of the patch dimension
_MAX_SAMPLE = 20_000         # patches drawn for learning; cost ∝ sample × atoms


@dataclass(frozen=True)
class Settings:
    """One complete configuration of the records → features chain.

    Attributes
    ----------
    kind : {"vectors", "signals", "images"}
    record_shape : tuple of int
        Shape of one record.
    patch_size, stride : tuple of int or None
        Per spatial axis; ``None`` for vectors (the whole record is one patch).
    regions : tuple of int
        Pooling parts per spatial axis (``(1,)`` for vectors).
    n_atoms : int
        ``k``.
    n_nonzero : int
        Nonzeros per patch for the greedy coders.
    sample_patches : int
        Patches drawn to learn the dictionary (never more than the records hold).
    normalise : bool
        Per-patch mean removal and contrast normalisation.
    whiten : bool
        ZCA whitening of the patches (implies centring).
    reasons : mapping of str to str
        One sentence per value above, for users.
    """

    kind: str
    record_shape: tuple[int, ...]
    patch_size: tuple[int, ...] | None
    stride: tuple[int, ...] | None
    regions: tuple[int, ...]
    n_atoms: int
    n_nonzero: int
    sample_patches: int
    normalise: bool
    whiten: bool
    reasons: Mapping[str, str] = field(default_factory=dict, compare=False, repr=False)

    @property
    def grid(self) -> tuple[int, ...]:
        """Patch positions per spatial axis (``(1,)`` for vectors)."""
        return _grid(self.record_shape, self.kind, self.patch_size, self.stride)

    @property
    def patch_dimension(self) -> int:
        """``d``, values in one flattened patch."""
        return _patch_dimension(self.record_shape, self.kind, self.patch_size)

    def preprocessing(self) -> dict[str, bool]:
        """Keyword arguments of :class:`~atomline.stages.kernels.prep.Normaliser`."""
        return {"remove_mean": self.normalise, "contrast": self.normalise, "whiten": self.whiten}

    def values(self) -> dict[str, Any]:
        """The settings by name (:data:`SETTING_NAMES`), as :func:`check_settings` takes them."""
        return {name: getattr(self, name) for name in SETTING_NAMES}


def default_settings(record_shape: tuple[int, ...], n_records: int, *,
                     vectors: bool = False) -> Settings:
    """A configuration derived from the records' shape that is valid for that shape.

    Parameters
    ----------
    record_shape : tuple of int
        Shape of one record: ``(d,)`` (vectors, with ``vectors=True``), ``(L,)``
        (signals), ``(H, W)`` or ``(H, W, C)`` (images).
    n_records : int
        Rows of the records array (at least 2).
    vectors : bool
        The rank-1 records are feature vectors, not signals: no patches, one region.

    Returns
    -------
    Settings
        Passes :func:`check_settings` for the same shape and count.
    """
    kind, shape = _kind(record_shape, n_records, vectors)
    reasons: dict[str, str] = {}
    if kind == "vectors":
        size = stride = None
        regions: tuple[int, ...] = (1,)
        reasons["patch_size"] = "Vectors have no spatial axis, so each record is one whole patch."
        reasons["stride"] = "One patch per record leaves nothing to step over."
        reasons["regions"] = "One patch per record can only be pooled as one region."
    else:
        spatial = shape[:1] if kind == "signals" else shape[:2]
        size, stride, reasons["patch_size"], reasons["stride"] = _patches(kind, spatial)
        grid = _grid(shape, kind, size, stride)
        want = _SIGNAL_REGIONS if kind == "signals" else _IMAGE_REGIONS
        regions = tuple(min(want, g) for g in grid)
        reasons["regions"] = (
            f"{' × '.join(map(str, regions))} pooled part(s) keep where along the "
            f"{'signal' if kind == 'signals' else 'image'} an atom fired (at most {want} per "
            f"axis, never more than the {' × '.join(map(str, grid))} patch positions).")
    values, more = geometry_defaults(kind, shape, size, stride, n_records)
    reasons.update(more)
    settings = Settings(kind, shape, size, stride, regions, **values,
                        reasons=MappingProxyType(reasons))
    _refuse_impossible(settings, n_records)
    return settings


def geometry_defaults(kind: str, shape: tuple[int, ...], size: tuple[int, ...] | None,
                      stride: tuple[int, ...] | None, n_records: int) -> tuple[dict, dict[str, str]]:
    """Atoms, nonzeros, sample and preprocessing for a patch geometry, with their reasons.

    The rules :func:`default_settings` applies to its own geometry, for a given one (the
    geometry must fit the records: check it with :func:`check_settings` first).

    Returns
    -------
    values : dict
        ``n_atoms``, ``n_nonzero``, ``sample_patches`` (int), ``normalise``, ``whiten`` (bool).
    reasons : dict of str to str
    """
    reasons: dict[str, str] = {}
    d = _patch_dimension(shape, kind, size)
    available = n_records * math.prod(_grid(shape, kind, size, stride))
    n_atoms = max(1, min(_OVERCOMPLETE * d, _MAX_ATOMS, available // _PATCHES_PER_ATOM))
    reasons["n_atoms"] = (
        f"{n_atoms} atoms: {_OVERCOMPLETE}× the patch dimension {d} (overcompleteness 1-4× is "
        f"usual), at most {_MAX_ATOMS}, and at most one per {_PATCHES_PER_ATOM} of the "
        f"{available} patches available.")
    n_nonzero = max(1, min(_NONZERO, n_atoms, d // _NONZERO_SHARE))
    reasons["n_nonzero"] = (
        f"{n_nonzero} nonzero(s) per patch: a handful, at most a quarter of the {d} values of "
        f"a patch and no more than the {n_atoms} atoms.")
    sample = min(available, _MAX_SAMPLE)
    reasons["sample_patches"] = (
        f"{sample} training patches: all {available} the records hold, up to {_MAX_SAMPLE} "
        "(learning cost grows with the sample).")
    # Per-patch mean removal zeroes a one-value patch, and feature vectors need not share a
    # unit, so a vector record is centred and whitened column-wise instead.
    normalise = kind != "vectors" and d >= 2
    whiten = kind == "vectors" and d >= 2
    reasons["normalise"] = (
        "Per-patch mean removal and contrast normalisation on: atoms then match shapes, not "
        "levels." if normalise else
        "Per-patch normalisation off: the values of a vector need not share a unit, and a "
        "one-value patch would be zeroed.")
    reasons["whiten"] = (
        "Whitening on: it centres and decorrelates the columns of the vectors, whose scales "
        "may differ." if whiten else
        "Whitening off: neighbouring samples are already on one scale, and its covariance "
        "needs many patches per dimension.")
    return ({"n_atoms": int(n_atoms), "n_nonzero": int(n_nonzero), "sample_patches": int(sample),
             "normalise": normalise, "whiten": whiten}, reasons)


def check_settings(record_shape: tuple[int, ...], n_records: int, *, vectors: bool = False,
                   **settings: Any) -> Settings:
    """Complete the given values with the defaults and refuse what cannot work.

    Parameters
    ----------
    record_shape : tuple of int
        Shape of one record (see :func:`default_settings`).
    n_records : int
        Rows of the records array.
    vectors : bool
        The rank-1 records are feature vectors.
    **settings
        Any of :data:`SETTING_NAMES`; ``patch_size``, ``stride`` and ``regions`` take an int
        (every axis) or one int per spatial axis. Values not given come from
        :func:`default_settings`; a given patch size without a stride gets the default
        stride rule for that size.

    Returns
    -------
    Settings
        The completed configuration; the reasons of given values say so.

    Raises
    ------
    InputError
        An unknown name, or a value that cannot work; the message names the value and what
        to change it to. Nothing has been read or computed.
    """
    unknown = sorted(set(settings) - set(SETTING_NAMES))
    if unknown:
        raise InputError(problem("settings", f"names among {list(SETTING_NAMES)}",
                                 f"unknown {unknown}", "Remove or rename them."))
    base = default_settings(record_shape, n_records, vectors=vectors)
    given = dict(settings)
    n_axes = len(base.regions)
    for name in ("patch_size", "stride", "regions"):
        if name in given and given[name] is not None:
            given[name] = _per_axis(given[name], n_axes, name)
    if base.kind == "vectors":
        for name in ("patch_size", "stride"):
            if given.get(name) is not None:
                raise InputError(problem(name, "none for vectors (each record is one patch)",
                                         str(given[name]), f"Drop {name}, or pass the records "
                                         "as signals (vectors=False) to cut them into patches."))
            given.pop(name, None)
    elif "patch_size" in given and "stride" not in given:
        given["stride"] = _stride(base.kind, _spatial(base), given["patch_size"])
    reasons = dict(base.reasons)
    reasons.update({name: f"{name} = {value} was given." for name, value in given.items()})
    made = replace(base, **given, reasons=MappingProxyType(reasons))
    _refuse_impossible(made, n_records)
    return made


# ---------------------------------------------------------------- helpers
def _kind(record_shape: tuple[int, ...], n_records: int,
          vectors: bool) -> tuple[str, tuple[int, ...]]:
    shape = tuple(int(s) for s in record_shape)
    if len(shape) not in (1, 2, 3) or any(s < 1 for s in shape):
        raise InputError(problem("record shape", "(d,), (L,), (H, W) or (H, W, C) with "
                                 "positive extents", str(shape),
                                 "Reshape the records to one of these shapes."))
    if vectors and len(shape) != 1:
        raise InputError(problem("vectors", "rank-1 records (d,) when vectors=True",
                                 f"records shaped {shape}", "Flatten them or pass vectors=False."))
    if int(n_records) < 2:
        raise InputError(problem("n_records", "at least 2 records", str(n_records),
                                 "Add records: a dictionary and a classifier need several."))
    if vectors:
        return "vectors", shape
    return ("signals" if len(shape) == 1 else "images"), shape


def _patches(kind: str, spatial: tuple[int, ...]) -> tuple[tuple[int, ...], tuple[int, ...], str, str]:
    if kind == "signals":
        share, (lo, hi), cap = _SIGNAL_PATCH_SHARE, _SIGNAL_PATCH_RANGE, _SIGNAL_MAX_POSITIONS
    else:
        share, (lo, hi), cap = _IMAGE_PATCH_SHARE, _IMAGE_PATCH_RANGE, _IMAGE_MAX_POSITIONS
    shortest = min(spatial)
    # Square patches on images: one size for both axes, from the shorter side. At most half of
    # it, so that even the shortest record has 2+ positions per axis to pool over.
    s = min(max(1, shortest // 2), max(lo, min(hi, round(shortest / share))))
    size = (s,) * len(spatial)
    stride = _stride(kind, spatial, size)
    unit = "samples" if kind == "signals" else "pixels"
    size_reason = (f"Patches of {s} {unit}: about 1/{share} of the {'length' if kind == 'signals' else 'shorter side'} "
                   f"{shortest}, kept between {lo} and {hi} and at most half of it.")
    stride_reason = (f"Stride {' × '.join(map(str, stride))}: a patch at every position, widened "
                     f"only to keep at most {cap} positions per axis (encoding cost).")
    return size, stride, size_reason, stride_reason


def _grid(shape: tuple[int, ...], kind: str, size: tuple[int, ...] | None,
          stride: tuple[int, ...] | None) -> tuple[int, ...]:
    if kind == "vectors":
        return (1,)
    spatial = shape[:1] if kind == "signals" else shape[:2]
    return tuple((e - s) // st + 1 for e, s, st in zip(spatial, size, stride))


def _patch_dimension(shape: tuple[int, ...], kind: str, size: tuple[int, ...] | None) -> int:
    if kind == "vectors":
        return shape[0]
    channels = shape[2] if len(shape) == 3 else 1
    return math.prod(size) * channels


def _per_axis(value: Any, n: int, name: str) -> tuple[int, ...]:
    values = (value,) * n if isinstance(value, numbers.Integral) else tuple(value)
    if len(values) != n or not all(isinstance(v, numbers.Integral) for v in values):
        raise InputError(problem(name, f"an int or {n} int(s), one per spatial axis", str(value),
                                 f"Give {name} as one int per axis."))
    return tuple(int(v) for v in values)


def _refuse_impossible(s: Settings, n_records: int) -> None:
    """Every rule a configuration must pass before any work; first failure raised."""
    if s.kind != "vectors":
        spatial = s.record_shape[:len(s.patch_size)]
        for axis, (size, extent) in enumerate(zip(s.patch_size, spatial)):
            if not 1 <= size <= extent:
                raise InputError(problem(
                    "patch_size", f"1..{extent} on axis {axis} (the record's extent)", str(size),
                    f"Use patch_size ≤ {extent}."))
        if any(st < 1 for st in s.stride):
            raise InputError(problem("stride", "≥ 1 on every axis", str(s.stride), "Use stride 1 or more."))
        grid = s.grid
        for axis, (r, g, size, st, extent) in enumerate(zip(s.regions, grid, s.patch_size,
                                                            s.stride, spatial)):
            if r < 1:
                raise InputError(problem("regions", "≥ 1 part per axis", str(s.regions), "Use regions 1 or more."))
            if r > g:
                fixes = [f"use regions {g}"]
                largest = _largest_patch(s.kind, extent, r)
                if largest:
                    fixes.append(f"a patch size ≤ {largest} (with its default stride)")
                # g = (extent - size) // stride + 1 ≥ r  ⇔  stride ≤ (extent - size) / (r - 1).
                if (extent - size) // (r - 1) >= 1:
                    fixes.append(f"a stride ≤ {(extent - size) // (r - 1)} with patch size {size}")
                raise InputError(problem(
                    "regions", f"at most the {g} patch position(s) on axis {axis}",
                    f"regions {r} on a grid of {g} position(s) (extent {extent}, patch {size}, "
                    f"stride {st})", "Either " + ", or ".join(fixes) + "."))
    elif s.regions != (1,):
        raise InputError(problem("regions", "1 for vectors (one patch per record)", str(s.regions),
                                 "Use regions 1."))
    d = s.patch_dimension
    available = n_records * math.prod(s.grid)
    if s.n_atoms < 1:
        raise InputError(problem("n_atoms", "at least 1", str(s.n_atoms), "Use n_atoms 1 or more."))
    if available < s.n_atoms:
        raise InputError(problem(
            "n_atoms", f"at most the {available} patches the {n_records} records hold",
            str(s.n_atoms), f"Use n_atoms ≤ {available}, or a smaller stride for more patches."))
    if s.sample_patches < s.n_atoms:
        raise InputError(problem("sample_patches", f"at least n_atoms = {s.n_atoms}",
                                 str(s.sample_patches),
                                 f"Use sample_patches ≥ {s.n_atoms} or n_atoms ≤ {s.sample_patches}."))
    if not 1 <= s.n_nonzero <= min(s.n_atoms, d):
        raise InputError(problem(
            "n_nonzero", f"1..{min(s.n_atoms, d)} (at most the atoms and the patch dimension {d})",
            str(s.n_nonzero), f"Use n_nonzero ≤ {min(s.n_atoms, d)}."))
    if s.normalise and d < 2:
        raise InputError(problem(
            "normalise", "patches of 2+ values (mean removal zeroes a one-value patch)",
            f"patch dimension {d}", "Use normalise False or a patch size ≥ 2."))


def _stride(kind: str, spatial: tuple[int, ...], size: tuple[int, ...]) -> tuple[int, ...]:
    """The default step for a patch size: dense, widened only to cap the positions per axis."""
    cap = _SIGNAL_MAX_POSITIONS if kind == "signals" else _IMAGE_MAX_POSITIONS
    # Dense patches (stride 1, every position: denser was better in the trade's experience and
    # it was the clearest effect in the study), unless that gives more positions per axis than
    # the cap; then the step grows just enough to keep the encoding cost per record bounded.
    return tuple(max(1, math.ceil((extent - s) / (cap - 1))) for extent, s in zip(spatial, size))


def _spatial(s: Settings) -> tuple[int, ...]:
    return s.record_shape[:1] if s.kind == "signals" else s.record_shape[:2]


def _largest_patch(kind: str, extent: int, regions: int) -> int:
    """Largest patch size whose default stride leaves ``regions`` positions (0 if none)."""
    for size in range(extent, 0, -1):
        (st,) = _stride(kind, (extent,), (size,))
        if (extent - size) // st + 1 >= regions:
            return size
    return 0
