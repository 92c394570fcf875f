"""Every option of the stages, declared once.

Each stage's options are one frozen dataclass: its fields carry the type, the default,
and in their metadata the help text, the choices, the command-line flag and whether the
option can change a nightly decision (``decides``). Everything else is made from these
declarations: the flows take the objects as parameters (Prefect validates them and shows
their fields in its UI, since pydantic reads standard dataclasses), the ``atomline``
command generates its arguments from them, and the nightly run key hashes their
deciding fields.

A value is checked when the object is made (``__post_init__``), with the stages' own
messages, so a bad option is refused before a workspace is opened or a task starts.
Rules that need the workspace (a patch longer than the records, regions beyond the patch
grid, labels too few for the folds) stay with the stages and ``flows/preflight.py``.

Choices of coders and learners come from the kernels' registries. This module imports
neither Prefect nor Zarr (a test checks), so the command line and the preflight can use
it without starting either.

Example
-------
>>> from atomline.stages.options import PoolOptions, TrainOptions
>>> TrainOptions(n_atoms=64, patch_size=[32], stride=16).patch_size
(32,)
>>> PoolOptions(reduce="median")  # doctest: +ELLIPSIS
Traceback (most recent call last):
...
atomline.stages.errors.InputError: reduce: expected one of ('max', 'mean'), found 'median'. ...
"""

import dataclasses
import math
import numbers
import os
from dataclasses import dataclass, field
from typing import Any

from .checks import check_curve, check_sample_size, check_tolerance, check_workers
from .errors import InputError, problem
from .kernels import coding, learning
from .kernels._records import keyword_options, refuse_unknown_options
from .kernels.classify import CLASSIFIERS  # the classifier kernels' own list
from .kernels.pooling import REDUCTIONS  # the pooling kernels' own list
from .kernels.scoring import SCORES
from .kernels.search import AXES

__all__ = ["TrainOptions", "EncodeOptions", "PoolOptions", "EvaluateOptions", "ReportOptions",
           "GateOptions", "DriftOptions", "SearchOptions", "RunnerOptions", "OPTION_GROUPS", "option_help",
           "deciding", "CODERS", "LEARNERS", "BAD_CHUNK_CHOICES", "REDUCTIONS", "CLASSIFIERS",
           "BASELINES", "DEFAULT_CURVE", "SPLITS", "RETRAIN", "RUNNERS"]

#: Coders by trade name (the coding kernels' registry).
CODERS = tuple(sorted(coding.METHODS))
#: Dictionary learners by trade name (the learning kernels' registry).
LEARNERS = tuple(sorted(learning.METHODS))
#: What a stage does with a missing or unreadable input chunk.
BAD_CHUNK_CHOICES = ("stop", "skip")
#: Feature sets the sparse features are compared with.
BASELINES = ("raw", "random_patches", "pca")
#: Shares of each fold's training rows on the learning curve.
DEFAULT_CURVE = (0.05, 0.15, 0.4)
#: How the evaluate stage splits rows into those the classifier learns from and those it scores.
SPLITS = {
    "kfold": "stratified k-fold cross-validation over the records; every row scored once",
    "test-set": "fit on the records, score the named test records (encoded and pooled by the "
                "same dictionary, coder and pooling)",
    "time": "row order is time: fit on the older rows, score the newest test_share of them",
}
#: When the nightly flow trains a candidate dictionary.
RETRAIN = {
    "always": "train a candidate on the current archive every run (appended rows change it)",
    "if-missing": "train only when no dictionary is promoted; otherwise keep the promoted one",
    "never": "never train; keep the promoted dictionary (there must be one)",
}
#: Prefect task runners the flows can use.
RUNNERS = ("threads", "processes", "dask")


def _option(default: Any = None, *, help: str, flag: str | None = None,
            choices: tuple | None = None, decides: bool = True, factory=None,
            shorthands: dict[str, str] | None = None) -> Any:
    """A dataclass field with its declaration in the metadata.

    ``flag``: the command-line flag when it is not ``--<name with dashes>`` (a bool that
    defaults to True is switched off by its flag, e.g. ``--no-split-sign``); ``decides``:
    whether the option can change a nightly decision (part of the run key);
    ``shorthands``: flags that set one key of a dict option (``--nonzero`` → ``n_nonzero``).
    """
    metadata = {"help": help, "flag": flag, "choices": choices, "decides": decides,
                "shorthands": dict(shorthands or {})}
    if factory is not None:
        return field(default_factory=factory, metadata=metadata)
    return field(default=default, metadata=metadata)


def _one_of(where: str, value: Any, choices, fix: str) -> None:
    if value not in choices:
        raise InputError(problem(where, f"one of {tuple(choices)}", repr(value), fix))


def _integer(value: Any) -> bool:
    # numbers.Integral: numpy integers too (a grid search hands them over); bools are not counts.
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def _positive_int(where: str, value: Any, fix: str, low: int = 1) -> None:
    if not _integer(value) or value < low:
        found = str(int(value)) if _integer(value) else repr(value)
        raise InputError(problem(where, "a positive integer" if low == 1 else f"an integer >= {low}",
                                 found, fix))


def _finite(where: str, value: Any, low: float, fix: str, strict: bool = False) -> None:
    ok = isinstance(value, numbers.Real) and not isinstance(value, bool) and math.isfinite(value) \
        and (value > low if strict else value >= low)
    if not ok:
        raise InputError(problem(where, f"a finite number {'>' if strict else '>='} {low}",
                                 repr(value), fix))


def _tuple_or_none(value: Any) -> Any:
    """Prefect parameters arrive as JSON and the CLI gives lists: sequences become tuples."""
    return tuple(value) if isinstance(value, (list, tuple)) else value


def _dict_or_none(value: Any, where: str) -> dict | None:
    if value is None:
        return None
    if not isinstance(value, dict):
        raise InputError(problem(where, "a dict of option names to values", repr(value),
                                 "Pass e.g. {'n_nonzero': 5}, or KEY=VALUE on the command line."))
    return dict(value)


def _set(obj: Any, **values: Any) -> None:
    for name, value in values.items():
        object.__setattr__(obj, name, value)  # frozen: normalised once, while being made


def _check_geometry(where: str, value: Any) -> None:
    if value is None:
        return
    sizes = (value,) if _integer(value) else value
    if not sizes or any(not _integer(s) or s < 1 for s in sizes):
        raise InputError(problem(where, "a positive integer per axis, or none", repr(value),
                                 "Use e.g. 64 (1-D) or 8 8 (images)."))


def _describe_fields(schema: dict, cls: type) -> None:
    """Put each field's help and choices into the JSON schema pydantic makes of ``cls``
    (Prefect shows it in its UI as the parameter's form)."""
    for f in dataclasses.fields(cls):
        prop = schema.get("properties", {}).get(f.name)
        if prop is None:
            continue
        prop["description"] = f.metadata["help"]
        if f.metadata["choices"] and prop.get("type") == "string":
            prop["enum"] = list(f.metadata["choices"])  # a drop-down in the UI
        elif f.metadata["choices"]:
            prop["examples"] = list(f.metadata["choices"])


#: Read by pydantic (a plain dict, so this module need not import it): field help in the UI.
_SCHEMA = {"json_schema_extra": _describe_fields}


def _check_coder_option_names(coder: str, options: dict) -> None:
    """Option names the coder does not take are refused, naming those it takes."""
    refuse_unknown_options(f"coder {coder!r}", options, keyword_options(coding.METHODS[coder].run),
                           "--coder")


@dataclass(frozen=True)
class TrainOptions:
    """How the train stage learns a dictionary (``train_dictionary``)."""

    __pydantic_config__ = _SCHEMA

    n_atoms: int | None = _option(flag="--atoms",
                                  help="number of atoms k (default: from the records' shape)")
    patch_size: int | tuple[int, ...] | None = _option(
        help="patch length (1-D) or height width (images) (default: from the records' shape; "
             "vectors are one whole patch)")
    stride: int | tuple[int, ...] | None = _option(
        help="step between patches (default: the given patch size, or from the records' shape)")
    method: str = _option("online", choices=LEARNERS, help="dictionary learner")
    coder: str = _option("omp", choices=CODERS,
                         help="sparse coder inside the learner, and the encode stage's default")
    coder_options: dict[str, Any] | None = _option(
        flag="--coder-option", shorthands={"--nonzero": "n_nonzero"},
        help="options of the coder, KEY=VALUE, repeatable (default: the coder's own, with "
             "n_nonzero from the records' shape for the greedy coders); "
             "--nonzero N sets n_nonzero")
    learner_options: dict[str, Any] | None = _option(
        flag="--learner-option", help="options of the learner, KEY=VALUE, repeatable (e.g. n_passes=2)")
    preprocessing: dict[str, Any] | None = _option(
        flag="--preprocessing-option",
        help="fields of the preprocessing (Normaliser), KEY=VALUE, repeatable (default: "
             "from the records' shape)")
    sample_patches: int | None = _option(
        flag="--sample", help="training patches sampled (default: from the records' shape)")
    seed: int = _option(0, help="seed of the sample, the learner and the evaluation")

    def __post_init__(self) -> None:
        _set(self, patch_size=_tuple_or_none(self.patch_size), stride=_tuple_or_none(self.stride),
             coder_options=_dict_or_none(self.coder_options, "coder_options"),
             learner_options=_dict_or_none(self.learner_options, "learner_options"),
             preprocessing=_dict_or_none(self.preprocessing, "preprocessing"))
        # None: chosen from the records' shape when the stage runs (stages/settings.py).
        learning.check_learner(self.method, 1 if self.n_atoms is None else self.n_atoms)
        if self.n_atoms is not None:
            _positive_int("n_atoms", self.n_atoms, "Ask for at least one atom.")
        _check_geometry("patch_size", self.patch_size)
        _check_geometry("stride", self.stride)
        _one_of("coder", self.coder, CODERS, "Pick a listed coder.")
        if self.sample_patches is not None:
            _positive_int("sample_patches", self.sample_patches, "Sample more patches.")
        if self.sample_patches is not None and self.n_atoms is not None:
            check_sample_size(self.sample_patches, self.n_atoms)
        _positive_int("seed", self.seed, "Use a seed of 0 or more.", low=0)
        learning.check_learner_options(self.method, self.learner_options or {},
                                       learning.TRAIN_OWN_OPTIONS)
        if learning.takes_coder(self.method):
            _check_coder_option_names(self.coder, self.train_coder_options)

    @property
    def train_coder_options(self) -> dict:
        """The coder's options inside the learner: the given ones over the coder's defaults."""
        return learning.default_coder_options(self.coder, self.coder_options)


@dataclass(frozen=True)
class EncodeOptions:
    """Which coder the encode stage uses, and what it does with a bad chunk."""

    __pydantic_config__ = _SCHEMA

    coder: str | None = _option(choices=CODERS,
                                help="sparse coder (default: the one the dictionary was trained with)")
    coder_options: dict[str, Any] | None = _option(
        flag="--coder-option", shorthands={"--nonzero": "n_nonzero"},
        help="options of the coder, KEY=VALUE, repeatable; with the dictionary's own coder each "
             "replaces only the training option of its name; --nonzero N sets n_nonzero")
    on_bad_chunk: str = _option("stop", choices=BAD_CHUNK_CHOICES,
                                help="a missing or unreadable input chunk stops the run, or is "
                                     "skipped and its rows left out and listed")

    def __post_init__(self) -> None:
        _set(self, coder_options=_dict_or_none(self.coder_options, "coder_options"))
        if self.coder is not None:
            _one_of("coder", self.coder, CODERS, "Pick a listed coder.")
            _check_coder_option_names(self.coder, self.coder_options or {})
        _one_of("on_bad_chunk", self.on_bad_chunk, BAD_CHUNK_CHOICES, "Pick 'stop' or 'skip'.")


@dataclass(frozen=True)
class PoolOptions:
    """How the pool stage turns a record's codes into one feature vector."""

    __pydantic_config__ = _SCHEMA

    reduce: str = _option("max", choices=REDUCTIONS,
                          help="how each region's coefficients become one number")
    split_sign: bool = _option(True, flag="--no-split-sign",
                               help="pool positive and negative parts separately "
                                    "(--no-split-sign pools |z|)")
    regions: int | tuple[int, ...] | None = _option(
        help="equal parts per spatial axis of the patch grid (default: from the records' shape, "
             "within the dictionary's grid)")
    on_bad_chunk: str = _option("stop", choices=BAD_CHUNK_CHOICES,
                                help="a missing or unreadable input chunk stops the run, or is "
                                     "skipped and its rows left out and listed")

    def __post_init__(self) -> None:
        regions = _tuple_or_none(self.regions)
        if isinstance(regions, tuple) and len(regions) == 1:
            regions = regions[0]  # one value is the same on every axis
        _set(self, regions=regions)
        _one_of("reduce", self.reduce, REDUCTIONS, "Pick a listed reduction.")
        if not isinstance(self.split_sign, bool):
            raise InputError(problem("split_sign", "True or False", repr(self.split_sign),
                                     "Pass a boolean."))
        _check_geometry("regions", self.regions)
        _one_of("on_bad_chunk", self.on_bad_chunk, BAD_CHUNK_CHOICES, "Pick 'stop' or 'skip'.")


@dataclass(frozen=True)
class EvaluateOptions:
    """How the evaluate stage scores a linear classifier on the features."""

    __pydantic_config__ = _SCHEMA

    split: str = _option("kfold", choices=tuple(SPLITS),
                         help="which rows train and which are scored: kfold (stratified folds), "
                              "test-set (score --test-records), time (score the newest "
                              "--test-share of the rows, in row order)")
    test_records: str | None = _option(
        help="records scored with --split test-set; labels of the same name; the flows encode "
             "and pool them with the evaluated dictionary")
    test_share: float = _option(0.2, help="share of the newest rows scored with --split time")
    folds: int = _option(5, help="stratified cross-validation folds (--split kfold)")
    classifier: str = _option("logistic", choices=CLASSIFIERS,
                              help="linear classifier on standardised features")
    C: float = _option(1.0, help="inverse regularisation strength of the classifier")
    max_rows: int = _option(20_000, help="labelled rows used at most, stratified sample")
    seed: int = _option(0, help="seed of the sample, the learner and the evaluation")
    baselines: tuple[str, ...] = _option(BASELINES, choices=BASELINES,
                                         help="feature sets compared with the sparse features")
    learning_curve: tuple[float, ...] = _option(
        DEFAULT_CURVE, flag="--curve", help="shares of the training rows on the learning curve; "
                                            "none to skip")
    n_boot: int = _option(2000, help="bootstrap resamples for the intervals")
    on_bad_chunk: str = _option("stop", choices=BAD_CHUNK_CHOICES,
                                help="a missing or unreadable input chunk stops the run, or is "
                                     "skipped and its rows left out and listed")

    def __post_init__(self) -> None:
        _set(self, baselines=tuple(self.baselines), learning_curve=tuple(self.learning_curve))
        _one_of("split", self.split, tuple(SPLITS), "Pick a listed split.")
        if (self.split == "test-set") != bool(self.test_records):
            raise InputError(problem(
                "test_records", "the name of the test records exactly with split 'test-set'",
                f"test_records={self.test_records!r} with split {self.split!r}",
                "Pass both --split test-set and --test-records NAME, or neither."))
        if not (isinstance(self.test_share, numbers.Real) and not isinstance(self.test_share, bool)
                and 0 < self.test_share < 1):
            raise InputError(problem("test_share", "a share strictly between 0 and 1",
                                     repr(self.test_share), "Use e.g. 0.2."))
        _positive_int("folds", self.folds, "Use e.g. 5 folds.", low=2)
        _one_of("classifier", self.classifier, CLASSIFIERS, "Pick a listed classifier.")
        _finite("C", self.C, 0.0, "Use e.g. C=1.0.", strict=True)
        _positive_int("max_rows", self.max_rows, "Use e.g. 20000 rows.")
        _positive_int("seed", self.seed, "Use a seed of 0 or more.", low=0)
        unknown = sorted(set(self.baselines) - set(BASELINES))
        if unknown:
            raise InputError(problem("baselines", f"a subset of {BASELINES}", str(unknown),
                                     "Drop the unknown names."))
        check_curve(self.learning_curve)
        _positive_int("n_boot", self.n_boot, "Use e.g. 2000 resamples.")
        _one_of("on_bad_chunk", self.on_bad_chunk, BAD_CHUNK_CHOICES, "Pick 'stop' or 'skip'.")


@dataclass(frozen=True)
class ReportOptions:
    """What the evaluate and nightly flows show besides the scores."""

    __pydantic_config__ = _SCHEMA

    pictures: bool = _option(True, flag="--no-pictures", decides=False,
                             help="render and store the pictures (--no-pictures: do not)")
    class_names: tuple[str, ...] | None = _option(
        decides=False, help="names of the classes, in label order, for pictures")

    def __post_init__(self) -> None:
        _set(self, class_names=_tuple_or_none(self.class_names))


@dataclass(frozen=True)
class GateOptions:
    """How the nightly flow decides whether a candidate dictionary is promoted."""

    __pydantic_config__ = _SCHEMA

    metric: str = _option("accuracy", choices=SCORES, help="score compared by the promotion gate")
    tolerance: float = _option(0.01, help="promote unless the candidate scores worse than the "
                                          "promoted one by more than this, or its interval "
                                          "reaches below it; the features must also score "
                                          "higher than the raw records with an interval "
                                          "reaching no lower than this")
    beat_baselines: bool = _option(False, help="promote only when the features also beat the "
                                               "best dictionary baseline (random patches, PCA), "
                                               "not only the raw records")
    fail_on_regression: bool = _option(False, decides=False,
                                       help="end a regressed run in a Failed state "
                                            "(default: Completed, named Regression)")
    retrain: str = _option("always", choices=tuple(RETRAIN),
                           help="always: train a candidate every run; if-missing/never: keep the "
                                "promoted dictionary and encode only records it has not covered yet")

    def __post_init__(self) -> None:
        _one_of("metric", self.metric, SCORES, "Pick a listed score.")
        _finite("tolerance", self.tolerance, -math.inf, "Use e.g. 0.01.")
        check_tolerance(self.tolerance)
        _one_of("retrain", self.retrain, tuple(RETRAIN), "Pick a listed policy.")


@dataclass(frozen=True)
class DriftOptions:
    """When the nightly flow retrains only on drift (``stages.drift``)."""

    __pydantic_config__ = _SCHEMA

    retrain_on_drift: bool = _option(False, help="retrain only when rows from --drift-since on "
                                                 "drifted from the earlier ones")
    drift_since: int | None = _option(help="first new row for the drift check")
    drift_threshold: float = _option(0.2, help="relative change of reconstruction error or "
                                               "nonzeros that counts as drift")

    def __post_init__(self) -> None:
        if self.drift_since is not None:
            _positive_int("drift_since", self.drift_since, "Name the first new row (1 or more).")
        _finite("drift_threshold", self.drift_threshold, 0.0, "Use e.g. 0.2.")


@dataclass(frozen=True)
class SearchOptions:
    """How ``atomline search`` spends its budget over configurations (``stages.search``)."""

    __pydantic_config__ = _SCHEMA

    budget: int = _option(12, help="configurations tried at the first rung (the shape defaults "
                                   "first, then changes on the searched axes)")
    eta: int = _option(3, flag="--reduction",
                       help="reduction factor: a rung keeps the best 1/eta of its configurations "
                            "and the next rung gives each eta times the rows")
    seed: int = _option(0, help="seed of the rows, folds, changes tried and learners")
    axes: tuple[str, ...] = _option(tuple(AXES), choices=tuple(AXES),
                                    help="what the search varies around the shape defaults")
    min_rows: int = _option(150, help="rows of a first-rung trial at least")
    max_rows: int = _option(2_000, help="labelled rows of the last rung at most (stratified sample)")
    folds: int = _option(3, help="stratified cross-validation folds of every trial")

    def __post_init__(self) -> None:
        _set(self, axes=tuple(self.axes))
        _positive_int("budget", self.budget, "Try at least one configuration.")
        _positive_int("eta", self.eta, "Use a reduction factor of 2 or more, e.g. 3.", low=2)
        _positive_int("seed", self.seed, "Use a seed of 0 or more.", low=0)
        unknown = sorted(set(self.axes) - set(AXES))
        if unknown:
            raise InputError(problem("axes", f"a subset of {tuple(AXES)}", str(unknown),
                                     "Drop the unknown names."))
        _positive_int("min_rows", self.min_rows, "Use e.g. 150 rows.")
        _positive_int("max_rows", self.max_rows, "Use e.g. 2000 rows.")
        if self.max_rows < self.min_rows:
            raise InputError(problem("max_rows", f"at least min_rows = {self.min_rows}",
                                     str(self.max_rows), "Raise max_rows or lower min_rows."))
        _positive_int("folds", self.folds, "Use e.g. 3 folds.", low=2)


def _cores() -> int:
    return os.cpu_count() or 1


@dataclass(frozen=True)
class RunnerOptions:
    """Where and how widely the flows run their tasks (see ``flows.runners``)."""

    __pydantic_config__ = _SCHEMA

    runner: str = _option("threads", choices=RUNNERS, decides=False, help="Prefect task runner")
    workers: int = _option(factory=_cores, decides=False,
                           help="parallel workers (default: the number of cores)")
    batches_per_worker: int = _option(4, decides=False,
                                      help="batches of whole chunks per worker, one Prefect task each")
    address: str | None = _option(flag="--dask-address", decides=False,
                                  help="scheduler address of an existing Dask cluster")
    dask_options: dict[str, Any] | None = _option(
        flag="--dask-option", decides=False,
        help="options of the local Dask cluster, KEY=VALUE, repeatable (e.g. local_directory=/tmp)")

    def __post_init__(self) -> None:
        _set(self, dask_options=_dict_or_none(self.dask_options, "dask_options"))
        _one_of("runner", self.runner, RUNNERS, "Pick a listed runner.")
        if not _integer(self.workers):
            raise InputError(problem("workers", "a positive integer", repr(self.workers),
                                     "Use --workers 1 or more."))
        check_workers(self.workers)
        _positive_int("batches_per_worker", self.batches_per_worker, "Use e.g. 4 batches per worker.")
        if self.address and self.runner != "dask":
            raise InputError(problem("address", "a scheduler address only with runner 'dask'",
                                     f"{self.address!r} with runner {self.runner!r}",
                                     "Add --runner dask, or leave out --dask-address."))
        if self.address and self.dask_options:
            raise InputError(problem("dask_options", "options of a local cluster only without an "
                                     "address (an existing cluster is configured where it runs)",
                                     f"{sorted(self.dask_options)} with address {self.address!r}",
                                     "Leave out either the address or the cluster options."))


#: Every group of options, by the name the flows give its parameter.
OPTION_GROUPS = {"train": TrainOptions, "encode": EncodeOptions, "pool": PoolOptions,
                 "evaluate": EvaluateOptions, "report": ReportOptions, "gate": GateOptions,
                 "drift": DriftOptions, "search": SearchOptions, "runner": RunnerOptions}


def option_help(cls: type, name: str) -> dict:
    """The declaration of field ``name`` of an options class: ``help``, ``flag``,
    ``choices``, ``decides``, ``shorthands``, and ``default`` (as a fresh object makes it)."""
    for f in dataclasses.fields(cls):
        if f.name == name:
            return dict(f.metadata, default=getattr(cls(), name), type=f.type)
    raise InputError(problem(f"options {cls.__name__}", f"a field among "
                             f"{[f.name for f in dataclasses.fields(cls)]}", repr(name),
                             "Check the spelling."))


def deciding(options: Any) -> dict:
    """The fields of an options object that can change a nightly decision (``decides``),
    as plain values (tuples become lists, as JSON would give them)."""
    def plain(value: Any) -> Any:
        return list(value) if isinstance(value, tuple) else value

    return {f.name: plain(getattr(options, f.name)) for f in dataclasses.fields(options)
            if f.metadata.get("decides", True)}
