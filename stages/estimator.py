"""A scikit-learn transformer: learn a dictionary, map records to pooled sparse features.

:class:`SparseCodePooler` follows scikit-learn's estimator protocol (``fit`` /
``transform`` / ``get_feature_names_out``, parameters in ``__init__``, fitted state in
attributes ending in ``_``), so it works inside a ``Pipeline`` and under
``GridSearchCV``. It is built on the same kernels as the workspace stages — the patch
geometry and normaliser of :mod:`.prep`, :func:`.learning.learn`, :func:`.coding.code`
and :func:`.pooling.pool_codes`, chained by :class:`.features.FeatureChain`, its
training sample drawn by the train stage's :func:`.features.sample_patches` — so in-memory
features equal the pipeline's for the same dictionary and options, and ``fit`` learns the
train stage's dictionary from the same records and options.

Example
-------
>>> from sklearn.datasets import load_digits
>>> from sklearn.linear_model import LogisticRegression
>>> from sklearn.pipeline import make_pipeline
>>> X, y = load_digits(return_X_y=True)
>>> model = make_pipeline(SparseCodePooler(n_atoms=32, record_shape=(8, 8), patch_size=4,
...                                        stride=2, regions=2, seed=0),
...                       LogisticRegression(max_iter=2000))
>>> model.fit(X[:500], y[:500]).score(X[500:700], y[500:700]) > 0.8
True
"""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from .errors import InputError, problem
from .kernels.features import FeatureChain, sample_patches
from .kernels.learning import learn
from .kernels.pooling import region_of_patches
from .kernels.prep import Normaliser, PatchGeometry
from .options import PoolOptions, TrainOptions

__all__ = ["SparseCodePooler"]


class SparseCodePooler(TransformerMixin, BaseEstimator):
    """Learn a dictionary of patches and turn each record into pooled sparse codes.

    Each row of ``X`` is one record, flattened; ``record_shape`` says how to lay it out
    (``(L,)`` for a 1-D signal, ``(H, W)`` or ``(H, W, C)`` for an image). Records are
    cut into patches, the patches normalised and sparse-coded over the learned atoms,
    and the codes pooled per region of the patch grid (see :mod:`.kernels.pooling`).

    Parameters
    ----------
    n_atoms : int
        ``k``, atoms to learn.
    record_shape : tuple of int, optional
        Shape of one record; ``(n_features_in_,)`` when omitted.
    patch_size, stride : int or tuple of int, optional
        Patch geometry (:class:`~atomline.stages.kernels.prep.PatchGeometry`); the whole record
        is one patch when ``patch_size`` is omitted.
    method : str
        Dictionary learner (``atomline.stages.kernels.learning.METHODS``).
    coder : str
        Sparse coder (``atomline.stages.kernels.coding.METHODS``), used in learning and transform.
    n_nonzero : int
        Nonzeros per patch for greedy coders (capped by ``k`` and the patch length).
    learner_options : dict, optional
        Other options of the learner.
    sample_patches : int
        Patches drawn (seeded) from the training records to learn from, as the train
        stage draws them (:func:`~atomline.stages.kernels.features.sample_patches`).
    reduce : {"max", "mean"}
    split_sign : bool
    regions : int or tuple of int
        Equal parts per spatial axis of the patch grid.
    seed : int

    Attributes
    ----------
    atoms_ : ndarray of shape (k, d)
        The learned dictionary (``d`` values per patch).
    normaliser_ : Normaliser
        The fitted patch normalisation.
    geometry_ : PatchGeometry
    n_features_in_ : int
    n_features_out_ : int
        ``(2 if split_sign else 1) × regions × k``.
    diagnostics_ : dict
        The learner's diagnostics (objective trace, usage, coherence).
    """

    def __init__(self, n_atoms: int = 64, *, record_shape: tuple | None = None,
                 patch_size: int | tuple | None = None, stride: int | tuple | None = None,
                 method: str = "online", coder: str = "omp", n_nonzero: int = 5,
                 learner_options: dict | None = None, sample_patches: int = 20_000,
                 reduce: str = "max", split_sign: bool = True, regions: int | tuple = 1,
                 seed: int = 0):
        self.n_atoms = n_atoms
        self.record_shape = record_shape
        self.patch_size = patch_size
        self.stride = stride
        self.method = method
        self.coder = coder
        self.n_nonzero = n_nonzero
        self.learner_options = learner_options
        self.sample_patches = sample_patches
        self.reduce = reduce
        self.split_sign = split_sign
        self.regions = regions
        self.seed = seed

    def fit(self, X, y=None) -> "SparseCodePooler":
        """Learn the dictionary from patches of the records in ``X``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Flattened records.
        y : ignored

        Returns
        -------
        self
        """
        X = validate_data(self, X, dtype=[np.float64, np.float32])
        geometry = self._geometry(X.shape[1])
        train, pool = self._options(geometry)  # refuses bad values before learning
        region_of_patches(geometry.grid, pool.regions)  # refuse bad regions before learning
        records = X.reshape(X.shape[0], *geometry.record_shape)
        # All records are in memory: one chunk.
        patches = sample_patches(X.shape[0], geometry, train.sample_patches, train.seed,
                                 chunk_rows=X.shape[0], read=lambda c: records)
        if patches.shape[0] < train.n_atoms:
            raise InputError(problem("X", f"at least n_atoms = {train.n_atoms} patches to learn from",
                                     f"{patches.shape[0]} patches from n_samples = {X.shape[0]}",
                                     "Pass more records or ask for fewer atoms."))
        learned = learn(patches, train.n_atoms, train.method, preprocessing=Normaliser(),
                        coder=train.coder, coder_options=train.train_coder_options,
                        seed=train.seed, **(train.learner_options or {}))
        self.atoms_ = learned.atoms
        self.normaliser_ = learned.preprocessing
        self.geometry_ = geometry
        self.diagnostics_ = learned.diagnostics
        self.n_features_out_ = self._chain().n_features
        return self

    def transform(self, X) -> np.ndarray:
        """Pooled sparse codes of each record.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features_in_)

        Returns
        -------
        ndarray of shape (n_samples, n_features_out_), float64
        """
        check_is_fitted(self, "atoms_")
        X = validate_data(self, X, dtype=[np.float64, np.float32], reset=False)
        records = X.reshape(X.shape[0], *self.geometry_.record_shape)
        return self._chain().features(records).astype(np.float64)

    def get_feature_names_out(self, input_features=None) -> np.ndarray:
        """Names ``<sign>_r<region>_a<atom>``, in the order of the columns of ``transform``.

        ``sign`` is ``pos``/``neg`` with ``split_sign``, else ``abs``.

        Returns
        -------
        ndarray of shape (n_features_out_,), object
        """
        check_is_fitted(self, "atoms_")
        if input_features is not None and len(input_features) != self.n_features_in_:
            raise InputError(problem("input_features", f"{self.n_features_in_} names",
                                     f"{len(input_features)}", "Pass one name per input column."))
        _, n_regions = region_of_patches(self.geometry_.grid, self.regions)
        signs = ("pos", "neg") if self.split_sign else ("abs",)
        k = self.atoms_.shape[0]
        return np.array([f"{s}_r{r}_a{a}" for s in signs for r in range(n_regions) for a in range(k)],
                        dtype=object)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.transformer_tags.preserves_dtype = ["float64"]
        return tags

    # ------------------------------------------------------------------ helpers
    def _options(self, geometry: PatchGeometry) -> tuple[TrainOptions, PoolOptions]:
        """The constructor's flat parameters (scikit-learn's protocol) as the stages' options,
        checked the same way."""
        train = TrainOptions(n_atoms=self.n_atoms, patch_size=self.patch_size, stride=self.stride,
                             method=self.method, coder=self.coder,
                             coder_options=self._coder_options(geometry),
                             learner_options=self.learner_options,
                             sample_patches=self.sample_patches, seed=self.seed)
        return train, PoolOptions(reduce=self.reduce, split_sign=self.split_sign, regions=self.regions)

    def _chain(self) -> FeatureChain:
        """The fitted dictionary's records→features chain (coded in float64)."""
        return FeatureChain(self.geometry_, self.atoms_, self.coder,
                            self._coder_options(self.geometry_), self.normaliser_,
                            regions=self.regions, reduce=self.reduce, split_sign=self.split_sign,
                            dtype=np.float64)

    def _geometry(self, n_columns: int) -> PatchGeometry:
        shape = (n_columns,) if self.record_shape is None else tuple(int(s) for s in self.record_shape)
        if int(np.prod(shape)) != n_columns:
            raise InputError(problem("record_shape", f"a shape of {n_columns} values (the columns of X)",
                                     f"{shape}", "Give the shape of one record."))
        return PatchGeometry.for_records(shape, self.patch_size, self.stride)

    def _coder_options(self, geometry: PatchGeometry) -> dict:
        if self.coder == "omp":
            # More nonzeros than atoms or than patch values cannot be chosen.
            return {"n_nonzero": int(min(self.n_nonzero, self.n_atoms, geometry.n_features))}
        return {}
