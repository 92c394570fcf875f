"""Every option declared once (``stages/options.py``): values are refused when an options
object is made, with the stages' message shape; Prefect validates the objects as flow
parameters and shows their declared help."""

from __future__ import annotations

import dataclasses
import json
import subprocess
import sys

import pytest

from atomline.stages import options as opts
from atomline.stages.errors import InputError
from atomline.stages.kernels import coding, learning
from atomline.stages.options import (DriftOptions, EncodeOptions, EvaluateOptions, GateOptions,
                                     PoolOptions, ReportOptions, RunnerOptions, TrainOptions)


def test_options_import_neither_prefect_nor_zarr():
    code = ("import sys, atomline.stages.options; "
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'prefect', 'zarr'}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_choices_come_from_the_kernels_registries():
    assert set(opts.CODERS) == set(coding.METHODS)
    assert set(opts.LEARNERS) == set(learning.METHODS)
    assert opts.option_help(TrainOptions, "method")["choices"] == opts.LEARNERS
    assert opts.option_help(EncodeOptions, "coder")["choices"] == opts.CODERS


REFUSED = [
    (TrainOptions, dict(n_atoms=0), "n_atoms: expected a positive integer, found 0"),
    (TrainOptions, dict(method="gradient-magic"), "learning method: expected one of"),
    (TrainOptions, dict(coder="omq"), "coder: expected one of"),
    (TrainOptions, dict(n_atoms=64, sample_patches=10), "sample_patches: expected at least n_atoms = 64"),
    (TrainOptions, dict(patch_size=0), "patch_size: expected a positive integer per axis"),
    (TrainOptions, dict(stride=(4, -1)), "stride: expected a positive integer per axis"),
    (TrainOptions, dict(coder_options={"n_nonzeros": 3}), "unknown ['n_nonzeros']"),
    (TrainOptions, dict(learner_options={"seed": 3}), "options other than the command's own"),
    (TrainOptions, dict(learner_options={"n_pases": 2}), "unknown ['n_pases']"),
    (TrainOptions, dict(seed=-1), "seed: expected an integer >= 0"),
    (EncodeOptions, dict(coder="omq"), "coder: expected one of"),
    (EncodeOptions, dict(coder="fista", coder_options={"lamda": 0.1}), "unknown ['lamda']"),
    (EncodeOptions, dict(on_bad_chunk="ignore"), "on_bad_chunk: expected one of ('stop', 'skip')"),
    (PoolOptions, dict(reduce="median"), "reduce: expected one of ('max', 'mean'), found 'median'"),
    (PoolOptions, dict(regions=0), "regions: expected a positive integer per axis"),
    (PoolOptions, dict(split_sign="no"), "split_sign: expected True or False"),
    (PoolOptions, dict(on_bad_chunk="retry"), "on_bad_chunk: expected one of"),
    (EvaluateOptions, dict(folds=1), "folds: expected an integer >= 2, found 1"),
    (EvaluateOptions, dict(classifier="forest"), "classifier: expected one of ('logistic', 'linear-svm')"),
    (EvaluateOptions, dict(C=0.0), "C: expected a finite number > 0.0"),
    (EvaluateOptions, dict(C=float("nan")), "C: expected a finite number > 0.0"),
    (EvaluateOptions, dict(max_rows=0), "max_rows: expected a positive integer"),
    (EvaluateOptions, dict(baselines=("raw", "wavelets")), "baselines: expected a subset of"),
    (EvaluateOptions, dict(learning_curve=(0.5, 1.0)), "learning_curve: expected shares strictly between 0 and 1"),
    (EvaluateOptions, dict(n_boot=0), "n_boot: expected a positive integer"),
    (GateOptions, dict(metric="auc"), "metric: expected one of"),
    (GateOptions, dict(tolerance=-0.1), "tolerance: expected a margin ≥ 0"),
    (GateOptions, dict(retrain="sometimes"), "retrain: expected one of ('always', 'if-missing', 'never')"),
    (DriftOptions, dict(drift_threshold=-0.1), "drift_threshold: expected a finite number >= 0.0"),
    (DriftOptions, dict(drift_since=0), "drift_since: expected a positive integer"),
    (RunnerOptions, dict(workers=0), "workers: expected a positive integer, found 0"),
    (RunnerOptions, dict(runner="cluster"), "runner: expected one of ('threads', 'processes', 'dask')"),
    (RunnerOptions, dict(batches_per_worker=0), "batches_per_worker: expected a positive integer"),
    (RunnerOptions, dict(address="tcp://s:8786"), "address: expected a scheduler address only with runner 'dask'"),
    (RunnerOptions, dict(runner="dask", address="tcp://s:8786", dask_options={"n_workers": 2}),
     "dask_options: expected options of a local cluster only without an address"),
]


@pytest.mark.parametrize("cls, values, words", REFUSED,
                         ids=[f"{c.__name__}-{'-'.join(v)}" for c, v, _ in REFUSED])
def test_bad_values_are_refused_when_the_options_are_made(cls, values, words):
    with pytest.raises(InputError) as refused:
        cls(**values)
    assert words in str(refused.value)
    assert ": expected " in str(refused.value) and ", found " in str(refused.value)


def test_sequences_become_tuples_and_one_region_is_every_axis():
    train = TrainOptions(patch_size=[8, 8], stride=[4, 4], coder_options={"n_nonzero": 3})
    assert train.patch_size == (8, 8) and train.stride == (4, 4)
    assert PoolOptions(regions=[2, 3]).regions == (2, 3)
    assert PoolOptions(regions=[2]).regions == 2
    assert EvaluateOptions(baselines=["raw"], learning_curve=[]).baselines == ("raw",)
    assert ReportOptions(class_names=["a", "b"]).class_names == ("a", "b")


def test_the_learners_coder_defaults_to_the_train_stage_options_and_a_copy_is_kept():
    given = {"n_nonzero": 3}
    train = TrainOptions(coder_options=given)
    given["n_nonzero"] = 9  # the caller's dict changing later does not change the options
    assert train.coder_options == {"n_nonzero": 3}
    assert TrainOptions().train_coder_options == coding.METHODS["omp"].defaults == {"n_nonzero": 5}


def test_options_are_frozen():
    with pytest.raises(dataclasses.FrozenInstanceError):
        PoolOptions().reduce = "mean"


def test_deciding_fields_leave_out_what_cannot_change_a_decision():
    assert "fail_on_regression" not in opts.deciding(GateOptions())
    assert opts.deciding(ReportOptions()) == {}
    assert opts.deciding(RunnerOptions(workers=7)) == {}
    assert opts.deciding(GateOptions(tolerance=0.05)) == {"metric": "accuracy", "tolerance": 0.05,
                                                          "beat_baselines": False,
                                                          "retrain": "always"}
    assert opts.deciding(EvaluateOptions())["learning_curve"] == list(opts.DEFAULT_CURVE)


def test_every_field_is_declared_with_help():
    for cls in opts.OPTION_GROUPS.values():
        for f in dataclasses.fields(cls):
            assert f.metadata["help"], (cls.__name__, f.name)


def test_prefect_validates_option_objects_as_flow_parameters():
    from prefect import flow
    from prefect.exceptions import ParameterTypeError

    @flow
    def takes(workspace: str, train: TrainOptions = TrainOptions(), pool: PoolOptions = PoolOptions()):
        return train, pool

    # What a deployment or the UI sends: JSON, so lists and dicts.
    given = takes.validate_parameters({"workspace": "w", "train": {"n_atoms": 16, "patch_size": [8, 8]},
                                       "pool": {"regions": [2, 2]}})
    assert given["train"] == TrainOptions(n_atoms=16, patch_size=(8, 8))
    assert given["pool"].regions == (2, 2)
    with pytest.raises(ParameterTypeError) as refused:
        takes.validate_parameters({"workspace": "w", "pool": {"reduce": "median"}})
    assert "reduce: expected one of ('max', 'mean'), found 'median'" in str(refused.value)


def test_prefect_shows_the_declared_help_and_choices():
    from prefect import flow
    from prefect.utilities.callables import parameter_schema

    @flow
    def takes(workspace: str, evaluate: EvaluateOptions = EvaluateOptions()):
        return evaluate

    schema = json.loads(json.dumps(parameter_schema(takes).model_dump()))
    fields = schema["definitions"]["EvaluateOptions"]["properties"]
    assert fields["classifier"]["enum"] == list(opts.CLASSIFIERS)
    assert fields["folds"]["description"] == opts.option_help(EvaluateOptions, "folds")["help"]
    assert fields["folds"]["default"] == 5


def test_the_module_example_holds():
    import doctest

    result = doctest.testmod(opts, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0 and result.failed == 0
