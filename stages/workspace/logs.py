"""The append-only logs: evaluations, promotion-gate decisions and report pictures.

Entries are added, never rewritten; an entry counts once its ``complete`` attribute (or,
for a picture, its attributes) is written, so one cut off by a crash is ignored.
"""

from __future__ import annotations

import datetime as _dt
import os
import time

import numpy as np

from . import leases as _leases
from .layout import _EVALUATION_ATTRS, _check_name, _now, _plain
from .safety import _check_group_members, require_attrs
from ..errors import InputError, LayoutError, LeaseHeld, NotFound, problem


class LogsMixin:
    """``evaluations/``, ``decisions/`` and ``reports/``."""

    def append_evaluation(self, attrs: dict, arrays: dict[str, np.ndarray], *, key: str | None = None) -> str:
        """Add one evaluation; evaluations are never rewritten.

        The group is written under the ``evaluations`` lease: arrays, then attributes,
        then ``complete``. An unfinished group left by a killed writer (no ``complete``)
        is removed first, since under the lease no live writer can own it.

        Parameters
        ----------
        attrs : dict
            Plain JSON describing what was measured and the scores.
        arrays : dict of str to ndarray
        key : str, optional
            What the evaluation measured (``evaluate.evaluation_key``), so a rerun can find
            it with :meth:`find_evaluation` instead of adding a second one.

        Returns
        -------
        str
            The new run id.
        """
        with self._append_lease("evaluations"):
            self._remove_unfinished("evaluations")
            stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%S%f")
            run_id = f"e{stamp}-{os.urandom(3).hex()}"
            g = self.root.create_group(f"evaluations/{run_id}")
            for name, value in arrays.items():
                g.create_array(name, data=np.asarray(value))
            extra = {"key": key} if key is not None else {}
            g.attrs.update(_plain(dict(attrs, run_id=run_id, created=_now(), **extra)))
            g.attrs["complete"] = True
        return run_id

    def find_evaluation(self, key: str) -> dict | None:
        """The attributes of the latest complete evaluation with this ``key``, or ``None``."""
        return next((e for e in reversed(self.evaluations()) if e.get("key") == key), None)

    def evaluations(self) -> list[dict]:
        """Attributes of every complete evaluation, oldest first."""
        out = []
        for key in self.root["evaluations"].group_keys():
            try:
                attrs = self.evaluation(key)
            except (NotFound, LayoutError):
                continue  # a crash mid-write leaves an incomplete group: not an evaluation
            out.append(attrs)
        return sorted(out, key=lambda a: a["run_id"])

    def evaluation(self, run_id: str) -> dict:
        """Attributes of one complete evaluation.

        Raises
        ------
        NotFound
            No evaluation of that id, or one whose writing did not finish.
        """
        path = f"evaluations/{_check_name(run_id, 'evaluation id')}"
        try:
            attrs = dict(self._node(path, "evaluation").attrs)
        except (ValueError, TypeError) as exc:  # unreadable metadata (torn or foreign)
            raise LayoutError(problem(path, "readable metadata", str(exc), "Ignore or delete it.")) from exc
        if attrs.get("complete") is not True:
            raise NotFound(problem(path, "a complete evaluation", "one whose writing did not finish",
                                   "Run the evaluation again; incomplete ones are ignored."))
        return require_attrs(attrs, _EVALUATION_ATTRS, path)

    def evaluation_arrays(self, run_id: str) -> dict[str, np.ndarray]:
        """The arrays of one evaluation (confusion matrices, …)."""
        self.evaluation(run_id)
        g = self._node(f"evaluations/{run_id}", "evaluation")
        _check_group_members(g, f"evaluations/{run_id}")
        return {k: np.asarray(self._node(f"evaluations/{run_id}/{k}", "array")[:])
                for k in g.array_keys()}

    def append_decision(self, attrs: dict) -> str:
        """Record one promotion-gate decision under ``decisions/<id>`` (append-only).

        Written under the ``decisions`` lease, ``complete`` last; an unfinished group left
        by a killed writer is removed first.

        Parameters
        ----------
        attrs : dict
            Plain JSON: outcome, candidate and promoted ids, the evaluations compared,
            and ``run_key`` (the nightly run's inputs, see :meth:`find_decision`).

        Returns
        -------
        str
            The new decision id.
        """
        with self._append_lease("decisions"):
            self._remove_unfinished("decisions")
            stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%S%f")
            decision_id = f"g{stamp}-{os.urandom(3).hex()}"
            g = self.root.require_group("decisions").create_group(decision_id)
            g.attrs.update(_plain(dict(attrs, decision_id=decision_id, created=_now())))
            g.attrs["complete"] = True
        return decision_id

    def decisions(self) -> list[dict]:
        """Attributes of every complete gate decision, oldest first (unfinished ones are ignored)."""
        if "decisions" not in self.root:
            return []
        out = []
        for k in self.root["decisions"].group_keys():
            try:
                out.append(dict(self.root[f"decisions/{k}"].attrs))
            except (ValueError, TypeError, KeyError):
                continue  # unreadable metadata of an unfinished group: not a decision
        return sorted((a for a in out if a.get("complete") is True), key=lambda a: a["decision_id"])

    def find_decision(self, run_key: str) -> dict | None:
        """The latest complete decision recorded with this ``run_key``, or ``None``."""
        return next((d for d in reversed(self.decisions()) if d.get("run_key") == run_key), None)

    def _append_lease(self, log: str) -> _leases.Lease:
        """The lease of an append-only log (``evaluations``, ``decisions``, ``trials``, ``recipes``).

        Held only while one entry is written (well under a second), so a second writer
        waits for it a few seconds rather than failing at once.
        """
        for _ in range(100):
            try:
                return self.lease(log, run=f"append to {log} (pid {os.getpid()})")
            except LeaseHeld:
                time.sleep(0.1)
        return self.lease(log, run=f"append to {log} (pid {os.getpid()})")

    def _remove_unfinished(self, log: str) -> None:
        """Delete the entries of ``log`` whose ``complete`` attribute was never written.

        Call only while holding the log's lease: every writer holds it until its entry is
        complete, so an unfinished entry seen then belongs to a writer that died.
        """
        if log not in self.root:
            return
        group = self.root[log]
        for k in list(group.group_keys()):
            try:
                finished = group[k].attrs.get("complete") is True
            except (ValueError, TypeError, KeyError):
                finished = False  # metadata cut off mid-write
            if not finished:
                del group[k]

    def save_picture(self, report_id: str, name: str, png: bytes, attrs: dict) -> str:
        """Store a PNG picture as bytes under ``reports/<report_id>/<name>``.

        Pictures live in the same store as everything else (a uint8 Zarr array holding
        the PNG file's bytes), so they travel with the workspace on any fsspec URL.

        Parameters
        ----------
        report_id : str
            Usually the evaluation run id the picture belongs to.
        name : str
        png : bytes
            A complete PNG file.
        attrs : dict
            Plain JSON (title, width, height, …); ``media_type`` is added.

        Returns
        -------
        str
            The picture's path in the workspace.
        """
        path = f"reports/{_check_name(report_id, 'report id')}/{_check_name(name, 'picture name')}"
        if not png.startswith(b"\x89PNG"):
            raise InputError(problem(path, "PNG bytes", f"{png[:8]!r}", "Render the picture as PNG."))
        if path in self.root and self._picture_attrs(path) is None:
            del self.root[path]  # bytes without attributes: cut off while being stored
        self._refuse_existing(path, False)
        self.root.require_group("reports").require_group(report_id)
        arr = self.root.create_array(path, data=np.frombuffer(png, dtype=np.uint8))
        arr.attrs.update(_plain(dict(attrs, media_type="image/png", created=_now())))
        return path

    def pictures(self) -> list[dict]:
        """Every stored picture: ``path``, ``report_id``, ``name``, ``bytes`` and its attrs."""
        if "reports" not in self.root:
            return []
        out = []
        for report_id in sorted(self.root["reports"].group_keys()):
            group = self.root[f"reports/{report_id}"]
            for name in sorted(group.array_keys()):
                attrs = self._picture_attrs(f"reports/{report_id}/{name}")
                if attrs is None:
                    continue  # its writer died between the bytes and the attributes
                out.append(dict(attrs, path=f"reports/{report_id}/{name}", report_id=report_id,
                                name=name, bytes=int(group[name].shape[0])))
        return out

    def _picture_attrs(self, path: str) -> dict | None:
        """A stored picture's attributes, or ``None`` while they were never written."""
        try:
            attrs = dict(self.root[path].attrs)
        except (ValueError, TypeError, KeyError):
            return None
        return attrs if attrs.get("media_type") == "image/png" else None

    def picture(self, path: str) -> bytes:
        """The PNG bytes of a stored picture (a path from :meth:`pictures`)."""
        if not path.startswith("reports/"):
            raise NotFound(problem(path, "a picture path under reports/", path,
                                   "List them with Workspace.pictures()."))
        return np.asarray(self._node(path, "picture")[:]).tobytes()
