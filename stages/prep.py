"""Patches and their normalisation: the kernels between records and the coders.

A *record* is one row of a workspace's ``data/<name>`` array: a vector ``(d,)``, a 1-D
signal ``(L,)`` or an image ``(H, W)`` / ``(H, W, C)``. The dictionary does not see
records but *patches*: windows of ``size`` samples (or ``size`` pixels square) taken
every ``stride`` along each spatial axis, flattened to vectors. Every record of an array
yields the same number of patches, laid out on a fixed grid, so the codes of record
``i`` are rows ``i * P ... (i + 1) * P - 1`` of the code array, where ``P`` is the number
of patches per record, and pooling can cut that grid into regions.

Everything here is a pure function of in-memory numpy arrays. Example::

    >>> import numpy as np
    >>> from atomline.stages.prep import PatchGeometry
    >>> geo = PatchGeometry.for_records((2048,), size=64, stride=32)
    >>> geo.grid, geo.n_features
    ((63,), 64)
    >>> geo.extract(np.zeros((3, 2048))).shape
    (189, 64)
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from .errors import InputError, problem

__all__ = ["PatchGeometry", "Normaliser"]


@dataclass(frozen=True)
class PatchGeometry:
    """Where patches are taken in a record.

    Attributes
    ----------
    record_shape : tuple of int
        Shape of one record without the row axis: ``(d,)``, ``(L,)``, ``(H, W)`` or
        ``(H, W, C)``.
    size : tuple of int
        Patch extent along each spatial axis (one entry for 1-D, two for images).
    stride : tuple of int
        Step between patch origins along each spatial axis.
    """

    record_shape: tuple[int, ...]
    size: tuple[int, ...]
    stride: tuple[int, ...]

    @classmethod
    def for_records(
        cls,
        record_shape: tuple[int, ...],
        size: int | tuple[int, ...] | None = None,
        stride: int | tuple[int, ...] | None = None,
    ) -> "PatchGeometry":
        """Validate and build a geometry.

        Parameters
        ----------
        record_shape : tuple of int
            Shape of one record, ``(L,)`` or ``(H, W[, C])``.
        size : int or tuple of int, optional
            Patch extent per spatial axis; an int is used on every axis. ``None`` takes the
            whole record as one patch (plain vectors).
        stride : int or tuple of int, optional
            Step between patches; defaults to ``size`` (no overlap).

        Returns
        -------
        PatchGeometry
        """
        record_shape = tuple(int(s) for s in record_shape)
        if len(record_shape) not in (1, 2, 3):
            raise InputError(
                problem(
                    "records",
                    "rows of rank 1 (vectors, signals) or 2-3 (images H×W[×C])",
                    f"rows of shape {record_shape}",
                    "Reshape the array to (n, L), (n, H, W) or (n, H, W, C).",
                )
            )
        n_spatial = 1 if len(record_shape) == 1 else 2
        spatial = record_shape[:n_spatial]
        size_t = spatial if size is None else _per_axis(size, n_spatial, "patch size")
        stride_t = size_t if stride is None else _per_axis(stride, n_spatial, "stride")
        for axis, (s, extent) in enumerate(zip(size_t, spatial)):
            if not 1 <= s <= extent:
                raise InputError(
                    problem(
                        "patch size",
                        f"between 1 and the record's extent {extent} on axis {axis}",
                        str(s),
                        "Choose a smaller patch size.",
                    )
                )
        if any(s < 1 for s in stride_t):
            raise InputError(
                problem("stride", "positive integers", str(stride_t), "Use a stride ≥ 1.")
            )
        return cls(record_shape, size_t, stride_t)

    @property
    def n_spatial(self) -> int:
        """Number of spatial axes (1 for signals and vectors, 2 for images)."""
        return len(self.size)

    @property
    def grid(self) -> tuple[int, ...]:
        """Number of patch positions along each spatial axis."""
        return tuple(
            (extent - s) // st + 1
            for extent, s, st in zip(self.record_shape, self.size, self.stride)
        )

    @property
    def patches_per_record(self) -> int:
        """``P``, the number of patches each record yields."""
        return int(np.prod(self.grid))

    @property
    def n_features(self) -> int:
        """``d``, the length of one flattened patch."""
        channels = self.record_shape[2] if len(self.record_shape) == 3 else 1
        return int(np.prod(self.size)) * channels

    def extract(self, records: np.ndarray) -> np.ndarray:
        """Cut records into flattened patches.

        Parameters
        ----------
        records : ndarray of shape (n, *record_shape)

        Returns
        -------
        ndarray of shape (n * patches_per_record, n_features)
            Patch rows grouped by record; within a record in raster order of the grid
            (row-major over the spatial axes). A 2-D patch is flattened row-major over
            ``(size_h, size_w[, C])``.
        """
        if records.shape[1:] != self.record_shape:
            raise InputError(
                problem(
                    "records",
                    f"rows of shape {self.record_shape}",
                    f"rows of shape {records.shape[1:]}",
                    "Use the geometry made for this array.",
                )
            )
        axes = tuple(range(1, 1 + self.n_spatial))
        windows = sliding_window_view(records, self.size, axis=axes)
        # windows: (n, *positions, [C], *size) -> take every stride-th position.
        take = (slice(None),) + tuple(slice(None, None, st) for st in self.stride)
        windows = windows[take]
        n = records.shape[0]
        if len(self.record_shape) == 3:
            # (n, gh, gw, C, sh, sw) -> (n, gh, gw, sh, sw, C): channel last in the patch.
            windows = np.moveaxis(windows, 3, -1)
        return np.ascontiguousarray(windows).reshape(n * self.patches_per_record, -1)

    def to_attrs(self) -> dict:
        """Plain-JSON form for Zarr attributes."""
        return {k: list(v) for k, v in asdict(self).items()}

    @classmethod
    def from_attrs(cls, attrs: dict) -> "PatchGeometry":
        """Inverse of :meth:`to_attrs`."""
        return cls(tuple(attrs["record_shape"]), tuple(attrs["size"]), tuple(attrs["stride"]))


def _per_axis(value: int | tuple[int, ...], n: int, what: str) -> tuple[int, ...]:
    if isinstance(value, (int, np.integer)):
        return (int(value),) * n
    value = tuple(int(v) for v in value)
    if len(value) != n:
        raise InputError(
            problem(what, f"{n} value(s), one per spatial axis", str(value), "Give one per axis.")
        )
    return value


@dataclass(frozen=True)
class Normaliser:
    """Per-patch mean removal and contrast normalisation, fitted once on a sample.

    ``x -> (x - mean(x)) / sqrt(var(x) + eps)`` per row, where ``eps`` is
    ``contrast_floor`` times the mean patch variance of the training sample. The floor
    keeps near-silent patches (pure sensor noise, flat image regions) from being blown up
    to unit contrast; the trade's common choice is a fixed fraction of the typical
    variance (a rule of thumb, not a derived value).

    Attributes
    ----------
    remove_mean : bool
        Subtract each patch's own mean.
    contrast : bool
        Divide each patch by its regularised standard deviation.
    eps : float
        The fitted variance floor (0 until :meth:`fit`).
    """

    remove_mean: bool = True
    contrast: bool = True
    contrast_floor: float = 0.1
    eps: float = 0.0

    def fit(self, patches: np.ndarray) -> "Normaliser":
        """Fit the variance floor on a sample.

        Parameters
        ----------
        patches : ndarray of shape (n_patches, d)

        Returns
        -------
        Normaliser
            A new, fitted normaliser.
        """
        var = _centred(patches, self.remove_mean).var(axis=1).mean()
        eps = float(self.contrast_floor * var) if self.contrast else 0.0
        # A floor of exactly 0 would divide constant patches by zero.
        eps = max(eps, float(np.finfo(np.float32).tiny)) if self.contrast else 0.0
        return Normaliser(self.remove_mean, self.contrast, self.contrast_floor, eps)

    def apply(self, patches: np.ndarray) -> np.ndarray:
        """Normalise patches row by row (each row independently of the others).

        Parameters
        ----------
        patches : ndarray of shape (n_patches, d)

        Returns
        -------
        ndarray of shape (n_patches, d), same floating dtype
        """
        out = _centred(patches, self.remove_mean)
        if self.contrast:
            scale = np.sqrt(np.mean(out * out, axis=1, keepdims=True) + self.eps)
            out = out / scale.astype(out.dtype, copy=False)
        return out

    def to_attrs(self) -> dict:
        """Plain-JSON scalars of the fitted state, for Zarr attributes."""
        return {k: (bool(v) if isinstance(v, bool) else float(v)) for k, v in asdict(self).items()}

    def arrays(self) -> dict[str, np.ndarray]:
        """Fitted arrays stored beside the atoms (none for per-patch normalisation)."""
        return {}

    @classmethod
    def from_stored(cls, attrs: dict, arrays: dict[str, np.ndarray]) -> "Normaliser":
        """Inverse of :meth:`to_attrs` and :meth:`arrays`."""
        return cls(**attrs)


def _centred(patches: np.ndarray, remove_mean: bool) -> np.ndarray:
    if remove_mean:
        return patches - patches.mean(axis=1, keepdims=True)
    return patches
