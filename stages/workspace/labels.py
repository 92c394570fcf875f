"""Labels: one integer class per record, under ``labels/<name>``."""

from __future__ import annotations

import hashlib
import os
from typing import Any

import numpy as np
import zarr

from .fingerprints import _recorded_rows
from .inputs import check_labels, load_npy
from .layout import _check_name
from ..errors import InputError, LayoutError, problem


class LabelsMixin:
    """``labels/<name>``: add, read and fingerprint the labels of records."""

    def add_labels(self, name: str, labels: np.ndarray | str | os.PathLike, *,
                   overwrite: bool = False) -> dict:
        """Store integer class labels for the records of the same name.

        Parameters
        ----------
        name : str
            The records they label (``data/<name>`` must exist).
        labels : ndarray of shape (n,) or path to a ``.npy`` file
            Integer labels, one per record.

        Returns
        -------
        dict
            ``{"name", "n", "classes"}``
        """
        _check_name(name, "labels name")
        if isinstance(labels, (str, os.PathLike)):
            labels = load_npy(labels)
        labels = np.asarray(labels)
        n = self.records(name).shape[0]
        if labels.ndim != 1 or labels.dtype.kind not in "iu":
            raise InputError(problem(f"labels {name!r}", "a 1-D integer array",
                                     f"shape {labels.shape}, dtype {labels.dtype}",
                                     "Encode classes as integers 0..C-1."))
        if labels.shape[0] != n:
            raise InputError(problem(f"labels {name!r}", f"{n} labels (one per record)",
                                     f"{labels.shape[0]}", "Pass one label per record."))
        labels = check_labels(labels, f"labels {name!r}")
        path = f"labels/{name}"
        self._refuse_existing(path, overwrite)
        self.root.create_array(path, data=labels, overwrite=True)
        return {"name": name, "n": int(n), "classes": sorted(int(c) for c in np.unique(labels))}

    def labels(self, name: str) -> np.ndarray:
        """ndarray of shape (n,), int64: the labels of ``data/<name>``."""
        node = self._node(f"labels/{_check_name(name, 'labels name')}", "labels")
        if not isinstance(node, zarr.Array) or node.ndim != 1 or np.dtype(node.dtype).kind not in "iu":
            raise LayoutError(problem(f"labels/{name}", "a 1-D integer array", f"{node}",
                                      "Add the labels again (add_labels, overwrite=True)."))
        return np.asarray(node[:])

    def labels_fingerprint(self, name: str) -> str:
        """16 hex digits of the SHA-256 of the labels of ``data/<name>`` (as int64)."""
        return hashlib.sha256(np.ascontiguousarray(self.labels(name), dtype=np.int64).tobytes()).hexdigest()[:16]

    def has_labels(self, name: str) -> bool:
        """Whether ``labels/<name>`` exists."""
        return f"labels/{name}" in self.root

    def _appended_labels(self, name: str, labels: Any, m: int) -> np.ndarray | None:
        """Validate the labels of appended rows against whether the records are labelled."""
        if isinstance(labels, (str, os.PathLike)):
            labels = load_npy(labels)
        if not self.has_labels(name):
            if labels is not None:
                raise InputError(problem(f"labels of rows appended to {name!r}", "none (unlabelled records)",
                                         f"{np.shape(labels)[0]} labels", "Add labels for all rows first."))
            return None
        if labels is None:
            raise InputError(problem(f"rows appended to {name!r}", f"{m} labels (the records are labelled)",
                                     "no labels", "Pass labels= with one label per new row."))
        labels = np.asarray(labels)
        if labels.ndim != 1 or labels.dtype.kind not in "iu" or labels.shape[0] != m:
            raise InputError(problem(f"labels of rows appended to {name!r}", f"{m} integer labels",
                                     f"shape {labels.shape}, dtype {labels.dtype}",
                                     "Pass one integer label per new row."))
        labels = check_labels(labels, f"labels of rows appended to {name!r}")
        lab = self.root[f"labels/{name}"]
        old = _recorded_rows(self._node(f"data/{name}", "records"))
        if lab.shape[0] != old:  # an earlier append stopped half-way
            lab.resize((old,))
        return labels
