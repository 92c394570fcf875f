"""The in-memory chain records → patches → normalise → code → pool, and seeded sampling.

One implementation, used by the scikit-learn transformer, the evaluation's dictionary
baselines and drift (the encode and pool stages run the same kernels chunk by chunk on
the workspace):

* :class:`FeatureChain` — a dictionary with its patch geometry, normaliser, coder and
  pooling: ``patches(records)``, ``codes(records)``, ``features(records)``;
* :func:`sample_patches` — a seeded uniform sample of patches from some rows of an
  archive, reading only the row chunks that hold chosen rows through a ``read(chunk)``
  callable (so this module does no I/O itself);
* :func:`baseline_atoms` — the random-patch and PCA dictionaries that need no labels and
  little learning, made by the learners ``random-patches`` and ``pca``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Iterator

import numpy as np

from ..errors import InputError, problem
from .coding import SparseCodes, code, code_outputs
from .learning import learn
from .pooling import n_pooled, pool_codes, region_of_patches
from .prep import Normaliser, PatchGeometry

__all__ = ["FeatureChain", "choose_rows", "row_blocks", "take_rows", "sample_patches",
           "baseline_atoms", "BASELINE_KINDS"]

#: Dictionaries :func:`baseline_atoms` makes.
BASELINE_KINDS = ("random_patches", "pca")

#: ``read(chunk)``: the rows of one row chunk of an archive, as an ndarray.
ChunkReader = Callable[[int], np.ndarray]


@dataclass(frozen=True, eq=False)
class FeatureChain:
    """Records to pooled sparse features with one dictionary, all in memory.

    Attributes
    ----------
    geometry : PatchGeometry
        How records are cut into patches.
    atoms : ndarray of shape (k, d)
    coder : str
        A coder of :data:`atomline.stages.kernels.coding.METHODS`.
    coder_options : dict
        Its options.
    normaliser : Normaliser, optional
        Fitted patch normalisation; none when omitted.
    regions : int or tuple of int
        Equal parts per spatial axis of the patch grid for pooling.
    reduce : {"max", "mean"}
    split_sign : bool
    dtype : numpy dtype, optional
        Floating dtype patches are coded in; the records' own when omitted (as the
        encode stage codes them).
    """

    geometry: PatchGeometry
    atoms: np.ndarray
    coder: str = "omp"
    coder_options: dict = field(default_factory=dict)
    normaliser: Normaliser | None = None
    regions: int | tuple[int, ...] = 1
    reduce: str = "max"
    split_sign: bool = True
    dtype: np.dtype | type | None = None

    @property
    def n_outputs(self) -> int:
        """Code outputs per patch (``k``; ``2k`` for split-sign thresholding)."""
        return code_outputs(self.coder, self.atoms.shape[0], **self.coder_options)

    @property
    def n_features(self) -> int:
        """``F``, the length of one record's feature vector."""
        _, n_regions = region_of_patches(self.geometry.grid, self.regions)
        return n_pooled(self.n_outputs, n_regions, self.split_sign)

    def patches(self, records: np.ndarray) -> np.ndarray:
        """Normalised patches of records.

        Parameters
        ----------
        records : ndarray of shape (n, *geometry.record_shape), floating

        Returns
        -------
        ndarray of shape (n * P, d), ``dtype`` (default: the records')
        """
        return self.normalise(self.geometry.extract(records))

    def normalise(self, patches: np.ndarray) -> np.ndarray:
        """Patches in ``dtype``, normalised.

        Parameters
        ----------
        patches : ndarray of shape (m, d), floating

        Returns
        -------
        ndarray of shape (m, d), ``dtype`` (default: the patches')
        """
        X = patches if self.dtype is None else patches.astype(self.dtype)
        return X if self.normaliser is None else self.normaliser.apply(X)

    def code_patches(self, patches: np.ndarray) -> SparseCodes:
        """Sparse codes of normalised patches (atoms cast to the patches' dtype).

        Parameters
        ----------
        patches : ndarray of shape (m, d), float32 or float64

        Returns
        -------
        SparseCodes
            ``m`` rows.
        """
        return code(patches, self.atoms.astype(patches.dtype), self.coder, **self.coder_options)

    def codes(self, records: np.ndarray) -> SparseCodes:
        """Sparse codes of every patch of the records, grouped by record.

        Parameters
        ----------
        records : ndarray of shape (n, *geometry.record_shape)

        Returns
        -------
        SparseCodes
            ``n * P`` rows.
        """
        return self.code_patches(self.patches(records))

    def features(self, records: np.ndarray) -> np.ndarray:
        """Pooled sparse codes of each record.

        Parameters
        ----------
        records : ndarray of shape (n, *geometry.record_shape)

        Returns
        -------
        ndarray of shape (n, F), float32
            As the pool stage stores them (:func:`~.pooling.pool_codes`).
        """
        region, n_regions = region_of_patches(self.geometry.grid, self.regions)
        codes = self.codes(records)
        return pool_codes(codes.index, codes.value, n_atoms=self.n_outputs, patch_region=region,
                          n_regions=n_regions, reduce=self.reduce, split_sign=self.split_sign)


def choose_rows(candidates: int | np.ndarray, patches_per_record: int, n_patches: int,
                rng: np.random.Generator) -> np.ndarray:
    """Rows to draw patches from: twice the fewest that hold ``n_patches`` patches.

    Drawn uniformly without replacement among the candidates (twice the minimum, for
    patch diversity), independent of how the archive is chunked.

    Parameters
    ----------
    candidates : int or ndarray of shape (n,), int
        ``n`` for rows ``0 … n−1``, or the row numbers to choose among.
    patches_per_record : int
        ``P``.
    n_patches : int
    rng : numpy.random.Generator

    Returns
    -------
    ndarray of shape (min(n, 2·⌈n_patches / P⌉),), int64
        Sorted row numbers.
    """
    n = int(candidates) if np.ndim(candidates) == 0 else len(candidates)
    n_rows = min(n, -(-int(n_patches) // int(patches_per_record)) * 2)
    return np.sort(rng.choice(candidates, size=n_rows, replace=False))


def row_blocks(rows: np.ndarray, chunk_rows: int, read: ChunkReader) -> Iterator[np.ndarray]:
    """The given rows of an archive, one block per row chunk that holds some.

    Parameters
    ----------
    rows : ndarray of shape (m,), int
        Sorted row numbers.
    chunk_rows : int
        Rows per chunk of the archive (chunk ``c`` holds rows ``c·chunk_rows …``).
    read : callable
        ``read(c)`` returns the rows of chunk ``c`` (and names it if it is bad); only
        chunks holding some of ``rows`` are read, each once.

    Yields
    ------
    ndarray of shape (m_c, ...)
        The rows of ``rows`` in chunk ``c``, in order.
    """
    rows = np.asarray(rows, dtype=np.int64)
    for c in np.unique(rows // int(chunk_rows)).tolist():
        yield read(c)[rows[rows // chunk_rows == c] - c * chunk_rows]


def take_rows(rows: np.ndarray, chunk_rows: int, read: ChunkReader) -> np.ndarray:
    """The given sorted rows, read chunk by chunk (never the whole array at once).

    Parameters and reading as :func:`row_blocks`.

    Returns
    -------
    ndarray of shape (m, ...)
    """
    return np.concatenate(list(row_blocks(rows, chunk_rows, read)))


def sample_patches(candidates: int | np.ndarray, geometry: PatchGeometry, n_patches: int,
                   seed: int, *, chunk_rows: int, read: ChunkReader) -> np.ndarray:
    """A seeded uniform sample of patches, reading only the chunks it needs.

    Rows are chosen first (:func:`choose_rows`), then ``n_patches`` of their patches
    (without replacement, kept in row order); the result depends on the seed, the
    candidates and the data only, never on the chunking.

    Parameters
    ----------
    candidates : int or ndarray of int
        ``n`` for rows ``0 … n−1``, or the sorted row numbers to draw from.
    geometry : PatchGeometry
    n_patches : int
        Patches wanted; fewer when the chosen rows hold fewer.
    seed : int
    chunk_rows : int
        Rows per chunk of the archive.
    read : callable
        ``read(c)`` returns the rows of chunk ``c``.

    Returns
    -------
    ndarray of shape (min(n_patches, available), d), float64
        Raw patches (not normalised).
    """
    rng = np.random.default_rng(seed)
    chosen = choose_rows(candidates, geometry.patches_per_record, n_patches, rng)
    patches = np.concatenate([geometry.extract(block)
                              for block in row_blocks(chosen, chunk_rows, read)])
    keep = np.sort(rng.choice(patches.shape[0], size=min(n_patches, patches.shape[0]), replace=False))
    return patches[keep].astype(np.float64)


def baseline_atoms(kind: str, patches: np.ndarray, n_atoms: int, seed: int = 0) -> np.ndarray:
    """A dictionary that needs no labels and little learning, for the baselines.

    Parameters
    ----------
    kind : {"random_patches", "pca"}
        ``random_patches``: the learner ``random-patches`` (``n_atoms`` rows drawn
        uniformly, seeded, scaled to unit norm) over the patches of non-zero norm.
        ``pca``: the learner ``pca``, the leading ``min(n_atoms, d, m)`` principal
        directions of the patches (orthonormal).
    patches : ndarray of shape (m, d)
        Preprocessed patches.
    n_atoms : int
    seed : int

    Returns
    -------
    ndarray of shape (k', d), float64
        ``k' = n_atoms`` for random patches, ``min(n_atoms, d, m)`` for PCA.
    """
    patches = np.asarray(patches, dtype=np.float64)
    if kind == "random_patches":
        # Flat patches normalise to zero and cannot be atoms: draw among the others.
        norms = np.linalg.norm(patches, axis=1)
        usable = patches[norms > 1e-8 * max(float(norms.max(initial=0)), 1e-300)]
        if usable.shape[0] == 0:
            raise InputError(problem("baseline patches", "some non-constant patches",
                                     "only zero patches", "Check the records."))
        return learn(usable, n_atoms, "random-patches", holdout=0.0, seed=seed).atoms
    if kind == "pca":
        k = min(n_atoms, patches.shape[1], patches.shape[0])
        return learn(patches, k, "pca", holdout=0.0, seed=seed).atoms
    raise InputError(problem("baseline dictionary", f"one of {BASELINE_KINDS}", repr(kind),
                             "Pick a listed baseline."))
