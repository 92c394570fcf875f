"""Dictionaries: atoms with their preprocessing, the encoders learned for them, training
checkpoints, and the promoted-dictionary pointer with the check a promotion rests on."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass

import numpy as np

from ..kernels.prep import Normaliser, PatchGeometry
from .inputs import _check_atoms
from .layout import _DICTIONARY_ATTRS, _DICTIONARY_OPTIONAL, _MARK, _check_name, _now, _package_version, _plain
from .safety import _check_group_members, require_attrs
from ..errors import FingerprintMismatch, InputError, LayoutError, NotFound, OutputExists, problem


@dataclass(frozen=True)
class StoredDictionary:
    """A dictionary read back from a workspace.

    Attributes
    ----------
    dict_id : str
    atoms : ndarray of shape (k, d), float64
    attrs : dict
        Everything recorded with it (method, parameters, seed, geometry, fingerprints,
        diagnostics, preprocessing, created time, package version).
    arrays : dict of str to ndarray
        Preprocessing arrays stored beside the atoms.
    """

    dict_id: str
    atoms: np.ndarray
    attrs: dict
    arrays: dict

    @property
    def fingerprint(self) -> str:
        """Digest of the atoms and their preprocessing."""
        return self.attrs["fingerprint"]

    def geometry(self) -> PatchGeometry:
        """How records are cut into patches for these atoms (the dictionary's own copy is
        the authoritative one; a codes output's ``geometry`` attribute only repeats it)."""
        return PatchGeometry.from_attrs(self.attrs["geometry"])

    def normaliser(self) -> Normaliser:
        """The fitted preprocessing that turns patches into rows the atoms fit."""
        return Normaliser.from_stored(self.attrs["preprocessing"], self.arrays)

    def coder(self) -> tuple[str, dict]:
        """The coder the atoms were trained with and its options, as ``(name, options)``.

        Codes made by the encode stage record the coder they were made with (their
        ``params``), which may be another; read that where codes exist.
        """
        return self.attrs["coder"], dict(self.attrs["coder_options"])


class DictionariesMixin:
    """``dictionaries/<id>`` and the root's ``promoted`` pointer."""

    def save_dictionary(self, dict_id: str, atoms: np.ndarray, attrs: dict,
                        arrays: dict[str, np.ndarray] | None = None) -> StoredDictionary:
        """Store a dictionary; it counts as complete only once its attributes are written.

        Parameters
        ----------
        dict_id : str
        atoms : ndarray of shape (k, d)
        attrs : dict
            Plain JSON: method, params, seed, geometry, preprocessing, fingerprints,
            diagnostics. ``created``, ``version`` and ``fingerprint`` are added.
        arrays : dict of str to ndarray, optional
            Preprocessing arrays (mean, whitening, …).

        Returns
        -------
        StoredDictionary
        """
        _check_name(dict_id, "dictionary id")
        path = f"dictionaries/{dict_id}"
        _check_atoms(np.asarray(atoms), path)
        for key, value in (arrays or {}).items():
            value = np.asarray(value)
            if value.dtype.kind not in "biuf" or not np.isfinite(value).all():
                raise InputError(problem(f"{path}, array {key!r}", "finite numbers",
                                         f"dtype {value.dtype}" + ("" if value.dtype.kind not in "f" else " with NaN/Inf"),
                                         "Fix the preprocessing before storing the dictionary."))
        if path in self.root and self.root[path].attrs.get("complete"):
            raise OutputExists(problem(path, "a new dictionary id", "a finished dictionary",
                                       "Use another id, or reuse the stored one."))
        self._refuse_leased(path)
        g = self.root.create_group(path, overwrite=True)
        atoms = np.ascontiguousarray(atoms, dtype=np.float64)
        g.create_array("atoms", data=atoms)
        arrays = arrays or {}
        for key, value in arrays.items():
            g.create_array(f"prep_{_check_name(key, 'array name')}", data=np.asarray(value))
        digest = hashlib.sha256(atoms.tobytes())
        for key in sorted(arrays):
            digest.update(np.ascontiguousarray(arrays[key]).tobytes())
        digest.update(json.dumps(attrs.get("preprocessing", {}), sort_keys=True).encode())
        full = dict(attrs, fingerprint=digest.hexdigest()[:16], created=_now(),
                    version=_package_version(), prep_arrays=sorted(arrays))
        g.attrs.update(_plain(full))
        g.attrs["complete"] = True  # last: a crash before this leaves no usable dictionary
        return self.load_dictionary(dict_id)

    def load_dictionary(self, dict_id: str) -> StoredDictionary:
        """Read a complete dictionary.

        Returns
        -------
        StoredDictionary
        """
        path = f"dictionaries/{_check_name(dict_id, 'dictionary id')}"
        g = self._node(path, "dictionary")
        attrs = dict(g.attrs)
        if attrs.get("complete") is not True:
            raise NotFound(problem(path, "a complete dictionary",
                                   "one whose training did not finish",
                                   "Run the train flow again; it resumes."))
        require_attrs(attrs, _DICTIONARY_ATTRS, path, _DICTIONARY_OPTIONAL)
        names = attrs["prep_arrays"]
        if not all(isinstance(k, str) for k in names):
            raise LayoutError(problem(f"{path}, attribute 'prep_arrays'", "a list of names",
                                      repr(names)[:200], "Train the dictionary again."))
        arrays = {k: np.asarray(self._node(f"{path}/prep_{_check_name(k, 'array name')}", "array")[:])
                  for k in names}
        atoms = np.asarray(self._node(f"{path}/atoms", "atoms")[:])
        _check_atoms(atoms, path, LayoutError)
        if atoms.shape[0] != attrs.get("n_atoms", atoms.shape[0]) or (
                atoms.shape[1] != attrs.get("n_features", atoms.shape[1])):
            raise LayoutError(problem(f"{path}/atoms", f"shape ({attrs['n_atoms']}, {attrs.get('n_features')})",
                                      f"shape {atoms.shape}", "The dictionary was altered; train it again."))
        return StoredDictionary(dict_id, atoms, attrs, arrays)

    def save_encoder(self, dict_id: str, name: str, arrays: dict[str, np.ndarray],
                     attrs: dict) -> str:
        """Store a learned fast encoder beside the dictionary it was trained for.

        It lives under ``dictionaries/<dict_id>/encoders/<name>`` (arrays, then attributes,
        ``complete`` last) and is never rewritten.

        Parameters
        ----------
        dict_id : str
            A complete dictionary.
        name : str
        arrays : dict of str to ndarray
            The encoder's matrices and thresholds.
        attrs : dict
            Plain JSON describing it; a ``fingerprint`` of the arrays is added.

        Returns
        -------
        str
            The encoder's fingerprint.
        """
        self.load_dictionary(dict_id)
        path = f"dictionaries/{dict_id}/encoders/{_check_name(name, 'encoder name')}"
        self._refuse_existing(path, False)
        g = self.root.require_group(f"dictionaries/{dict_id}/encoders").create_group(name)
        digest = hashlib.sha256()
        for key in sorted(arrays):
            value = np.ascontiguousarray(arrays[key])
            g.create_array(_check_name(key, "array name"), data=value)
            digest.update(key.encode() + value.tobytes())
        fingerprint = digest.hexdigest()[:16]
        g.attrs.update(_plain(dict(attrs, fingerprint=fingerprint, created=_now(),
                                   arrays=sorted(arrays))))
        g.attrs["complete"] = True
        return fingerprint

    def load_encoder(self, dict_id: str, name: str) -> tuple[dict, dict[str, np.ndarray]]:
        """The attributes and arrays of a stored encoder (see :meth:`save_encoder`)."""
        path = f"dictionaries/{_check_name(dict_id, 'dictionary id')}/encoders/{_check_name(name, 'encoder name')}"
        g = self._node(path, "encoder")
        attrs = dict(g.attrs)
        if attrs.get("complete") is not True:
            raise NotFound(problem(path, "a complete encoder", "one whose writing did not finish",
                                   "Train the encoder again."))
        _check_group_members(g, path)
        return attrs, {k: np.asarray(g[k][:]) for k in attrs["arrays"]}

    def save_checkpoint(self, dict_id: str, state: dict) -> None:
        """Keep a learner's state while ``dictionaries/<dict_id>`` is being trained.

        The state (numpy arrays and plain-JSON values) goes into a new numbered group
        under ``dictionaries/<dict_id>/checkpoints``, whose ``complete`` attribute is
        written last; older checkpoints are removed only after that. Storing the
        finished dictionary replaces the whole group, checkpoints included.

        Parameters
        ----------
        dict_id : str
        state : dict
            As passed to a learner's ``checkpoint`` callback.
        """
        base = self.root.require_group(f"dictionaries/{_check_name(dict_id, 'dictionary id')}")
        ckpts = base.require_group("checkpoints")
        older = sorted(ckpts.group_keys())
        seq = f"{int(older[-1]) + 1:08d}" if older else f"{0:08d}"
        g = ckpts.create_group(seq)
        arrays, values = {}, {}
        for i, (key, value) in enumerate(sorted(state.items())):
            if isinstance(value, np.ndarray):
                g.create_array(f"a{i}", data=value)
                arrays[key] = f"a{i}"
            else:
                values[key] = value
        g.attrs.update(_plain({"arrays": arrays, "values": values}))
        g.attrs["complete"] = True
        for old in older:
            del ckpts[old]

    def load_checkpoint(self, dict_id: str) -> dict | None:
        """The latest complete checkpoint of a dictionary in training, or ``None``."""
        path = f"dictionaries/{_check_name(dict_id, 'dictionary id')}/checkpoints"
        if path not in self.root:
            return None
        for seq in sorted(self.root[path].group_keys(), reverse=True):
            g = self.root[f"{path}/{seq}"]
            attrs = dict(g.attrs)
            if attrs.get("complete") is not True:
                continue  # cut off while being written: fall back to the one before
            try:
                _check_group_members(g, f"{path}/{seq}")
                state = dict(attrs["values"])
                state.update({k: np.asarray(g[name][:]) for k, name in attrs["arrays"].items()})
            except (KeyError, FileNotFoundError):
                continue  # removed by its writer while being read (a newer one exists)
            return state
        return None

    def has_dictionary(self, dict_id: str) -> bool:
        """Whether a complete dictionary ``dict_id`` exists."""
        path = f"dictionaries/{dict_id}"
        return path in self.root and bool(self.root[path].attrs.get("complete"))

    def dictionary_ids(self) -> list[str]:
        """Ids of the complete dictionaries, oldest first."""
        ids = [k for k in self.root["dictionaries"].group_keys() if self.has_dictionary(k)]
        return sorted(ids, key=lambda k: self.root[f"dictionaries/{k}"].attrs.get("created", ""))

    @property
    def promoted(self) -> str | None:
        """Id of the promoted dictionary, or ``None``."""
        return self._mark().get("promoted")

    def promote(self, dict_id: str, *, evaluation: str | None = None) -> None:
        """Point the workspace at ``dict_id``.

        Parameters
        ----------
        dict_id : str
            A complete dictionary.
        evaluation : str, optional
            Run id of the evaluation that justifies the move. When given (the nightly
            gate always gives it), the pointer moves only if that evaluation is complete,
            measured ``dict_id``, and measured the features that are stored now, complete,
            under ``features/<dict_id>/<records>`` (same fingerprint).

        Raises
        ------
        NotFound, FingerprintMismatch, InputError
            Something the promotion rests on is missing or incomplete; the pointer is
            left where it was.
        """
        self.check_promotion(dict_id, evaluation=evaluation)
        with self.lease("promoted", run=f"promote {dict_id}"):  # one pointer move at a time
            mark = self._mark()
            mark["promoted"] = dict_id
            self.root.attrs[_MARK] = mark

    def check_promotion(self, dict_id: str, *, evaluation: str | None = None) -> None:
        """Refuse, without moving anything, a promotion that :meth:`promote` would refuse.

        The nightly gate checks first, records its decision, then moves the pointer, so a
        run killed in between finds its decision and only has the move left to do.
        """
        self.load_dictionary(dict_id)
        if evaluation is not None:
            attrs = self.evaluation(evaluation)
            where = f"evaluations/{evaluation}"
            if attrs["dict_id"] != dict_id:
                raise FingerprintMismatch(problem(where, f"an evaluation of {dict_id}",
                                                  f"one of {attrs['dict_id']}", "Evaluate the candidate first."))
            path = f"features/{dict_id}/{attrs['records']}"
            out = self.output(path)
            if not out.complete:
                raise InputError(problem(path, "complete features", "unfinished features",
                                         "Finish the pool flow before promoting."))
            if out.attrs["fingerprint"] != attrs.get("features_fingerprint"):
                raise FingerprintMismatch(problem(where, f"features fingerprint {out.attrs['fingerprint']}",
                                                  str(attrs.get("features_fingerprint")),
                                                  "The features changed since; evaluate again."))
