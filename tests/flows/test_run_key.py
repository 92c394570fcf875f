"""The nightly run key hashes exactly the deciding fields of the nightly flow's option objects."""

from __future__ import annotations

import dataclasses
import inspect

import numpy as np
import pytest

from atomline.flows import nightly_flow
from atomline.flows.pipeline import nightly_key_options
from atomline.stages.gate import nightly_run_key
from atomline.stages import options as opts
from atomline.stages.workspace import Workspace

#: For every field of every option group the nightly flow takes: a valid value other than
#: the default. Adding a field to a group without adding it here fails the first test.
OTHER = {
    "train": dict(n_atoms=16, patch_size=32, stride=16, method="sgd", coder="mp",
                  coder_options={"n_nonzero": 3}, learner_options={"n_passes": 2},
                  preprocessing={"center": False}, sample_patches=1000, seed=7),
    "encode": dict(coder="omp", coder_options={"n_nonzero": 2}, on_bad_chunk="skip"),
    "pool": dict(reduce="mean", split_sign=False, regions=2, on_bad_chunk="skip"),
    "evaluate": dict(split="time", test_records="vib", test_share=0.3, folds=3, classifier="linear-svm", C=0.5, max_rows=500, seed=3,
                     baselines=("raw",), learning_curve=(0.5,), n_boot=100, on_bad_chunk="skip"),
    "report": dict(pictures=False, class_names=("a", "b")),
    "gate": dict(metric="macro_f1", tolerance=0.05, beat_baselines=True, fail_on_regression=True,
                 retrain="if-missing"),
    "drift": dict(retrain_on_drift=True, drift_since=10, drift_threshold=0.5),
    "runner": dict(runner="processes", workers=1, batches_per_worker=2,
                   dask_options={"local_directory": "/tmp"}, address="tcp://scheduler:8786"),
}
#: Fields whose other value needs another field changed with it (an address needs dask).
WITH = {("runner", "address"): {"runner": "dask"},
        ("evaluate", "test_records"): {"split": "test-set"}}
#: What the key hashed before the flows took option objects (their flat parameters then),
#: by group: the same fields count now. The encode group's coder and coder options are new
#: to the nightly flow (it always encoded with the dictionary's own coder) and count, as
#: they change the features; so does the gate's ``beat_baselines`` (it changes the outcome).
DECIDING_BEFORE = {
    "train": {"n_atoms", "patch_size", "stride", "method", "coder", "coder_options",
              "learner_options", "preprocessing", "sample_patches", "seed"},
    "encode": {"on_bad_chunk"},
    "pool": {"reduce", "split_sign", "regions", "on_bad_chunk"},
    "evaluate": {"split", "test_records", "test_share", "folds", "classifier", "C", "max_rows", "seed", "baselines", "learning_curve",
                 "n_boot", "on_bad_chunk"},
    "report": set(), "gate": {"metric", "tolerance", "retrain"},
    "drift": {"retrain_on_drift", "drift_since", "drift_threshold"}, "runner": set(),
}
NEW_TO_NIGHTLY = {("encode", "coder"), ("encode", "coder_options"), ("gate", "beat_baselines")}


def _groups() -> dict:
    """The option groups of the nightly flow: its parameters whose type is an options class."""
    params = inspect.signature(nightly_flow.fn).parameters
    return {name: opts.OPTION_GROUPS[name] for name in params if name in opts.OPTION_GROUPS}


def test_every_group_of_the_nightly_flow_is_covered():
    groups = _groups()
    # Every group but the search's is a nightly parameter: a search is its own flow, and its
    # winner reaches the nightly run through the stored recipe, not through the run's options.
    assert set(groups) == set(opts.OPTION_GROUPS) - {"search"} == set(OTHER)
    for name, cls in groups.items():
        assert set(OTHER[name]) == {f.name for f in dataclasses.fields(cls)}, name
        assert inspect.signature(nightly_flow.fn).parameters[name].annotation in (cls, cls.__name__)


@pytest.fixture(scope="module")
def ws():
    w = Workspace.open(f"memory://run-key-{id(object())}", create=True)
    w.add_records("vib", np.arange(64 * 20, dtype=np.float32).reshape(20, 64))
    w.add_labels("vib", np.arange(20) % 2)
    return w


def _key(ws: Workspace, labels=None, **changed: object) -> str:
    groups = {name: cls() for name, cls in _groups().items()}
    groups.update(changed)
    return nightly_run_key(ws, "vib", nightly_key_options(labels, **groups))


def test_each_deciding_field_changes_the_key_and_no_other_does(ws):
    base = _key(ws)
    assert _key(ws) == base
    assert _key(ws, labels="vib") != base  # the labels' name is an input too
    deciding = {}
    for name, cls in _groups().items():
        for field, value in OTHER[name].items():
            changed = dataclasses.replace(cls(), **WITH.get((name, field), {}), **{field: value})
            assert getattr(changed, field) != getattr(cls(), field), (name, field)
            if _key(ws, **{name: changed}) != base:
                deciding.setdefault(name, set()).add(field)
    # Exactly the declared ones move the key ...
    declared = {name: {f.name for f in dataclasses.fields(cls) if f.metadata["decides"]}
                for name, cls in _groups().items()}
    assert {n: fields for n, fields in declared.items() if fields} == deciding
    # ... and they are the ones that counted before, plus the encode coder now offered.
    before = {(n, f) for n, fields in DECIDING_BEFORE.items() for f in fields}
    assert {(n, f) for n, fields in deciding.items() for f in fields} == before | NEW_TO_NIGHTLY


def test_the_key_follows_the_records_content(ws):
    base = _key(ws)
    other = Workspace.open(f"memory://run-key-other-{id(object())}", create=True)
    other.add_records("vib", np.ones((20, 64), dtype=np.float32))
    other.add_labels("vib", np.arange(20) % 2)
    assert nightly_run_key(other, "vib", nightly_key_options(
        None, **{name: cls() for name, cls in _groups().items()})) != base
