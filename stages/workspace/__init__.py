"""The workspace: one Zarr v3 group that holds everything a pipeline produces.

This is the only module that knows the layout::

    data/<name>               records (n, d), (n, L) or (n, H, W[, C]); float32/float64
                              (or a group that links to an array in another store)
    labels/<name>             (n,) integer class labels
    dictionaries/<id>/        atoms (k, d) + preprocessing arrays; attrs describe it
    codes/<dict-id>/<name>/   index (rows, q) int32, value (rows, q) float32,
                              count (rows,) int32, done (n_chunks,) uint8
    features/<dict-id>/<name>/values (n, F) float32, done (n_chunks,) uint8
    evaluations/<run-id>/     one group per evaluation (append-only)
    decisions/<id>/           one group per promotion-gate decision (append-only, attrs)
    trials/<id>/              one group per search trial (append-only, attrs; trials.py)
    recipes/<id>/             one group per stored recipe (append-only, attrs; trials.py)
    reports/<run-id>/<name>   pictures: uint8 arrays holding PNG files' bytes
    .leases/<output>.json     write leases of running stages (not Zarr nodes)

A done flag is 0 (to do), 1 (done) or 2 (done without data: its input chunk was bad
and the run was told to skip it; the output's ``skipped`` attribute lists the rows).

The root group's attributes carry the layout version and the pointer to the promoted
dictionary. A whole run is one URL: a local directory, or any fsspec URL such as
``memory://name`` or ``s3://bucket/prefix``.

Chunk protocol (see :class:`Output`): work is cut along the records' row chunks; a task
owns whole output chunks; it writes the data of a chunk first and the chunk's done flag
last, and a rerun skips chunks whose flag is set.

Example::

    >>> import numpy as np
    >>> from atomline.stages.workspace import Workspace
    >>> ws = Workspace.open("memory://doc-example", create=True)
    >>> info = ws.add_records("signals", np.zeros((10, 32), dtype=np.float32), chunk_rows=4)
    >>> info["n_chunks"], ws.records("signals").shape
    (3, (10, 32))

Package map: one module per concept, composed into :class:`Workspace` as mixins (the
way xarray composes its Dataset): ``store`` (opening, URLs, storage options, node access),
``layout`` (version, attribute schemas, names and paths), ``inputs`` (what callers may
pass), ``fingerprints``, ``records``, ``labels``, ``dictionaries``, ``outputs`` (the chunk
protocol), ``logs`` (evaluations, decisions, pictures), ``leases``, ``safety`` (refusing
unsafe metadata) and ``_zarr`` (the only module touching Zarr internals). Mixins rather
than a facade over concept objects because every concept works on the same root group
and the same node checks, and callers keep calling ``ws.<method>`` unchanged.
"""

from __future__ import annotations

from .dictionaries import DictionariesMixin, StoredDictionary
from .fingerprints import fingerprint_params
from .inputs import BAD_CHUNK_CHOICES, check_bad_chunk_choice, check_finite, check_labels, check_records, load_npy
from .labels import LabelsMixin
from .layout import LAYOUT_VERSION
from .leases import _HELD_LEASES, LeasesMixin
from .logs import LogsMixin
from .outputs import Output, OutputsMixin, iter_row_chunks
from .records import RecordsMixin
from .store import STORAGE_OPTIONS_ENV, StoreMixin, open_workspace, resolve_storage_options

__all__ = ["Workspace", "open_workspace", "Output", "StoredDictionary", "LAYOUT_VERSION", "fingerprint_params",
           "BAD_CHUNK_CHOICES", "check_bad_chunk_choice",
           "resolve_storage_options", "STORAGE_OPTIONS_ENV"]


class Workspace(RecordsMixin, LabelsMixin, DictionariesMixin, OutputsMixin, LogsMixin, LeasesMixin,
                StoreMixin):
    """An atomline workspace on any Zarr store.

    Use :meth:`open`; the constructor takes an already opened root group.
    """

    def summary(self) -> dict:
        """What the workspace holds, as plain JSON."""
        data = {}
        for name in self.root["data"].keys():
            data[name] = self.describe_records(name)
            data[name]["labelled"] = self.has_labels(name)
        dicts = {}
        for dict_id in self.dictionary_ids():
            a = self.root[f"dictionaries/{dict_id}"].attrs
            dicts[dict_id] = {"method": a.get("method"), "n_atoms": a.get("n_atoms"),
                              "records": a.get("records"), "created": a.get("created")}
        outputs = {}
        for top in ("codes", "features"):
            for dict_id in self.root[top].group_keys():
                for name in self.root[f"{top}/{dict_id}"].group_keys():
                    out = self.output(f"{top}/{dict_id}/{name}")
                    flags = out.done_flags()
                    outputs[f"{top}/{dict_id}/{name}"] = {"chunks_done": int(flags.sum()),
                                                          "n_chunks": int(flags.size)}
        evaluations = self.evaluations()
        latest = None
        if evaluations:
            e = evaluations[-1]
            latest = {"run_id": e["run_id"], "dict_id": e["dict_id"], "tag": e.get("tag", ""),
                      "metrics": {k: v.get("accuracy") for k, v in e["metrics"].items()}}
        return {"url": self.url, "layout": LAYOUT_VERSION, "promoted": self.promoted,
                "records": data, "dictionaries": dicts, "outputs": outputs,
                "evaluations": len(evaluations), "latest_evaluation": latest,
                "decisions": len(self.decisions()),
                "pictures": [{k: p[k] for k in ("path", "title", "bytes") if k in p}
                             for p in self.pictures()]}
