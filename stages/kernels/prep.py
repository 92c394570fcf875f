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
    >>> from atomline.stages.kernels.prep import PatchGeometry
    >>> geo = PatchGeometry.for_records((2048,), size=64, stride=32)
    >>> geo.grid, geo.n_features
    ((63,), 64)
    >>> geo.extract(np.zeros((3, 2048))).shape
    (189, 64)
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field, fields, replace

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from .coding._rows import product, row_energies, row_means
from ..errors import InputError, problem

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
    """Preprocessing fitted once on a training sample and applied identically later.

    Steps, in order, each optional:

    1. per-patch mean removal: ``x ← x − mean(x)`` (``remove_mean``);
    2. per-patch contrast normalisation: ``x ← x / sqrt(mean(x²) + eps)``
       (``contrast``), where ``eps`` is ``contrast_floor`` times the mean patch
       variance of the training sample. The floor keeps near-silent patches (pure
       sensor noise, flat image regions) from being blown up to unit contrast; the
       trade's common choice is a fixed fraction of the typical variance (a rule of
       thumb, not a derived value);
    3. dataset mean removal: ``x ← x − μ`` with ``μ`` the training sample's mean row
       (``center``);
    4. ZCA whitening: ``x ← (x − μ) M`` with ``M = U diag(1/sqrt(λ + whiten_eps)) Uᵀ``
       from the eigen-decomposition ``C = U diag(λ) Uᵀ`` of the training sample's
       covariance after steps 1-2 (``whiten``; implies centring). ``whiten_eps``
       keeps directions of tiny variance (mostly noise) from being amplified; it is
       in the units of the variance of the rows after steps 1-2 (with contrast
       normalisation on, the per-feature variance is about 1, and 0.1 is a common
       rule of thumb for image patches).

    Each step is a function of one row and the fitted arrays only, so rows are
    transformed independently of their chunk.

    Attributes
    ----------
    remove_mean : bool
    contrast : bool
    contrast_floor : float
    eps : float
        The fitted variance floor (0 until :meth:`fit`).
    center : bool
    whiten : bool
    whiten_eps : float
    mean : ndarray of shape (d,) or None
        Fitted dataset mean (``center`` or ``whiten``).
    whitening : ndarray of shape (d, d) or None
        Fitted symmetric ZCA matrix ``M`` (``whiten``).
    """

    remove_mean: bool = True
    contrast: bool = True
    contrast_floor: float = 0.1
    eps: float = 0.0
    center: bool = False
    whiten: bool = False
    whiten_eps: float = 0.1
    mean: np.ndarray | None = field(default=None, compare=False, repr=False)
    whitening: np.ndarray | None = field(default=None, compare=False, repr=False)

    def fit(self, patches: np.ndarray) -> "Normaliser":
        """Fit the variance floor, the mean and the whitening on a sample.

        Parameters
        ----------
        patches : ndarray of shape (n_patches, d)

        Returns
        -------
        Normaliser
            A new, fitted normaliser.
        """
        patches = _checked(patches)
        out = _centred(patches, self.remove_mean)
        eps = 0.0
        if self.contrast:
            var = out.var(axis=1).mean()
            # A floor of exactly 0 would divide constant patches by zero.
            eps = max(float(self.contrast_floor * var), float(np.finfo(np.float32).tiny))
            out = _contrast(out, eps)
        mean = whitening = None
        if self.center or self.whiten:
            mean = out.mean(axis=0, dtype=np.float64)
        if self.whiten:
            if self.whiten_eps < 0:
                raise InputError(problem("whiten_eps", "a value ≥ 0", repr(self.whiten_eps),
                                         "Use e.g. 0.1 (units of the rows' variance)."))
            centred = np.asarray(out, dtype=np.float64) - mean
            cov = centred.T @ centred / max(centred.shape[0] - 1, 1)
            lam, U = np.linalg.eigh(cov)
            lam = np.clip(lam, 0.0, None)
            # Rank test relative to the largest eigenvalue (rounding leaves ~1e-16).
            if self.whiten_eps == 0 and lam.min() <= 1e-12 * max(lam.max(), 1e-300):
                raise InputError(problem("whitening", "a full-rank covariance when whiten_eps = 0",
                                         f"rank {int((lam > 1e-12 * lam.max()).sum())} of {lam.size}",
                                         "Set whiten_eps > 0 (per-patch mean removal "
                                         "always removes one direction)."))
            whitening = (U / np.sqrt(lam + self.whiten_eps)) @ U.T
        return replace(self, eps=eps, mean=mean, whitening=whitening)

    def apply(self, patches: np.ndarray) -> np.ndarray:
        """Transform patches row by row (each row independently of the others).

        Parameters
        ----------
        patches : ndarray of shape (n_patches, d)

        Returns
        -------
        ndarray of shape (n_patches, d), same floating dtype
        """
        if (self.center or self.whiten) and self.mean is None or (
            self.whiten and self.whitening is None
        ):
            raise InputError(problem("Normaliser", "a fitted normaliser (mean/whitening set)",
                                     "an unfitted one", "Call fit() on a training sample first."))
        out = _centred(patches, self.remove_mean)
        if self.contrast:
            out = _contrast(out, self.eps)
        if self.mean is not None:
            out = out - self.mean.astype(out.dtype, copy=False)
        if self.whitening is not None:
            out = product(out, self.whitening)  # row-invariant, unlike BLAS
        return out

    def to_attrs(self) -> dict:
        """Plain-JSON scalars of the fitted state, for Zarr attributes."""
        return {f.name: (bool(v) if isinstance(v, bool) else float(v))
                for f in fields(self) if f.name not in _ARRAYS
                for v in [getattr(self, f.name)]}

    def arrays(self) -> dict[str, np.ndarray]:
        """Fitted arrays stored beside the atoms: ``mean`` (d,), ``whitening`` (d, d).

        Returns
        -------
        dict of str to ndarray
            Only the arrays that were fitted (empty for per-patch steps only).
        """
        return {name: getattr(self, name) for name in _ARRAYS if getattr(self, name) is not None}

    @classmethod
    def from_stored(cls, attrs: dict, arrays: dict[str, np.ndarray]) -> "Normaliser":
        """Inverse of :meth:`to_attrs` and :meth:`arrays`."""
        scalars = {f.name for f in fields(cls)} - set(_ARRAYS)
        unknown = set(attrs) - scalars
        if unknown:
            raise InputError(problem("stored preprocessing", f"attributes among {sorted(scalars)}",
                                     f"unknown {sorted(unknown)}",
                                     "Read it with the atomline version that wrote it."))
        stored = {name: np.asarray(arrays[name], dtype=np.float64)
                  for name in _ARRAYS if name in arrays}
        made = cls(**attrs, **stored)
        if ((made.center or made.whiten) and made.mean is None) or (
            made.whiten and made.whitening is None
        ):
            raise InputError(problem("stored preprocessing", "the fitted mean/whitening arrays",
                                     f"arrays {sorted(arrays)}",
                                     "Store Normaliser.arrays() beside its attributes."))
        return made


_ARRAYS = ("mean", "whitening")


def _checked(patches: np.ndarray) -> np.ndarray:
    patches = np.asarray(patches)
    if patches.ndim != 2 or patches.shape[0] == 0 or patches.dtype.kind != "f":
        raise InputError(problem("preprocessing sample", "a non-empty float array (rows, d)",
                                 f"shape {patches.shape}, dtype {patches.dtype}",
                                 "Fit on patches as floating rows."))
    return patches


# Per-row sums go through the coding kernels' fixed-order reductions (numpy's peel their
# SIMD loops by memory alignment, so a row's mean could change with its place in a chunk).
def _centred(patches: np.ndarray, remove_mean: bool) -> np.ndarray:
    if remove_mean:
        return patches - row_means(patches)[:, None]
    return patches


def _contrast(centred: np.ndarray, eps: float) -> np.ndarray:
    d = max(centred.shape[1], 1)
    scale = np.sqrt(row_energies(centred).astype(np.float64) / d + eps)
    return centred / scale.astype(centred.dtype, copy=False)[:, None]
