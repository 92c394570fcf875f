"""The ``atomline`` argument parser: one sub-parser per command, and the option groups they share.

Each sub-parser carries its command's ``run``, ``check`` and ``describe`` functions as defaults.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import typing
from typing import Callable

from atomline.stages.options import SearchOptions

from .commands import (
    _check_demo, _check_encode, _check_evaluate, _check_nightly, _check_pool, _check_serve,
    _check_train, _run_add_labels, _run_add_records, _run_append, _run_demo, _run_encode,
    _run_evaluate, _run_history, _run_link, _run_nightly, _run_plots, _run_pool, _run_search,
    _run_serve, _run_show, _run_train, _run_train_encoder,
)
from .reports import (
    _describe_demo, _describe_evaluation, _describe_history, _describe_nightly, _describe_plots,
    _describe_records, _describe_search, _describe_serve, _describe_show, _describe_stage,
)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="atomline",
        description="Sparse-code features for large signal archives, as Prefect flows over a Zarr workspace.",
    )
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name: str, run: Callable, describe: Callable | None, help: str,
                check: Callable | None = None) -> argparse.ArgumentParser:
        sp = sub.add_parser(name, help=help, description=help)
        sp.set_defaults(run=run, **({"describe": describe} if describe else {}),
                        **({"check": check} if check else {}))
        sp.add_argument("--json", action="store_true", help="print the result as JSON for other tools")
        sp.add_argument("--verbose", action="store_true", help="show Prefect's own log lines")
        sp.add_argument("--debug", action="store_true", help="on an error, also print its traceback")
        return sp

    sp = command("demo", _run_demo, _describe_demo,
                 "build the synthetic vibration workspace and run the nightly flow on it", _check_demo)
    sp.add_argument("directory", nargs="?", default="atomline-demo.zarr",
                    help="workspace directory to create or reuse (default: %(default)s)")
    sp.add_argument("--records", type=int, default=4000, help="number of synthetic records (default: %(default)s)")
    sp.add_argument("--seed", type=int, default=0, help="seed of the data and the pipeline (default: %(default)s)")
    _runner_options(sp)

    sp = command("add-records", _run_add_records, _describe_records, "copy records from a .npy file into data/NAME")
    _ws_name(sp)
    sp.add_argument("file", help=".npy file of shape (n, L), (n, H, W) or (n, H, W, C), float32/float64; streamed")
    sp.add_argument("--chunk-rows", type=int, help="rows per Zarr chunk (default: about 4 MiB per chunk)")
    sp.add_argument("--overwrite", action="store_true", help="replace existing records of that name")
    sp.add_argument("--vectors", action="store_true",
                    help="rank-1 records are feature vectors, not signals: each record is one "
                         "patch (stored with the records)")

    sp = command("add-labels", _run_add_labels, None, "store integer labels for data/NAME from a .npy file")
    _ws_name(sp)
    sp.add_argument("file", help=".npy file of shape (n,), integer classes")
    sp.add_argument("--overwrite", action="store_true", help="replace existing labels")

    sp = command("append-records", _run_append, _describe_records,
                 "append rows from a .npy file to data/NAME (later runs encode only the new chunks)")
    _ws_name(sp)
    sp.add_argument("file", help=".npy file of new rows, same row shape and dtype as data/NAME; streamed")
    sp.add_argument("--labels", dest="labels_file",
                    help=".npy file of their integer labels (required if NAME is labelled)")

    sp = command("link-records", _run_link, _describe_records,
                 "use an existing Zarr array (any store URL) as data/NAME without copying it")
    _ws_name(sp)
    sp.add_argument("url", help="store holding the array (directory or fsspec URL)")
    sp.add_argument("--path", default="", help="path of the array inside that store")
    sp.add_argument("--overwrite", action="store_true", help="replace an existing entry of that name")

    sp = command("train", _run_train, None, "learn a dictionary from a sample of data/NAME", _check_train)
    _ws_name(sp)
    _train_options(sp)
    _fault_options(sp, bad_chunks=False)
    _runner_options(sp)

    sp = command("train-encoder", _run_train_encoder, None,
                 "train a learned fast encoder (unrolled ISTA) that imitates a coder, stored with the dictionary")
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    sp.add_argument("--encoder", default="learned", help="name to store it under (default: %(default)s)")
    sp.add_argument("--target", default="fista", help="coder to imitate (default: %(default)s)")
    sp.add_argument("--target-option", action="append", metavar="KEY=VALUE",
                    help="an option of the target coder, repeatable (e.g. lam=0.5)")
    sp.add_argument("--layers", type=int, default=3, help="thresholding layers (default: %(default)s)")
    sp.add_argument("--sample", type=int, default=5000, help="training patches (default: %(default)s)")
    sp.add_argument("--seed", type=int, default=0, help="seed (default: %(default)s)")

    sp = command("encode", _run_encode, _describe_stage, "sparse-code every chunk of data/NAME (resumes)",
                 _check_encode)
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    _coder_options(sp, default=None)
    sp.add_argument("--overwrite", action="store_true", help="replace codes made from other inputs")
    _fault_options(sp)
    _runner_options(sp)

    sp = command("pool", _run_pool, _describe_stage, "pool the codes of data/NAME into per-record features (resumes)",
                 _check_pool)
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    _pool_options(sp)
    sp.add_argument("--overwrite", action="store_true", help="replace features made with other options")
    _fault_options(sp)
    _runner_options(sp)

    sp = command("evaluate", _run_evaluate, _describe_evaluation,
                 "score a linear classifier on the features against the raw records", _check_evaluate)
    _ws_name(sp)
    sp.add_argument("--dictionary", help="dictionary id (default: the promoted one)")
    _evaluation_options(sp)
    _bad_chunk_option(sp)
    _runner_options(sp)

    sp = command("search", _run_search, _describe_search,
                 "try configurations around the shape defaults on labelled records by successive "
                 "halving, rank them, and store the winner as a recipe (a screening aid)")
    _ws_name(sp)
    sp.add_argument("--labels", help="labels array name (default: NAME)")
    sp.add_argument("--recipe", help="store the winner as this recipe; train, pool and nightly "
                                     "then use it for options not given")
    add_option_flags(sp, SearchOptions)
    _runner_options(sp)

    sp = command("nightly", _run_nightly, _describe_nightly,
                 "train a candidate dictionary, encode, pool, evaluate, and promote it if it holds up",
                 _check_nightly)
    _ws_name(sp)
    _nightly_options(sp)
    _runner_options(sp)

    sp = command("serve", _run_serve, _describe_serve,
                 "serve the nightly flow on a cron schedule with Prefect (runs until stopped)", _check_serve)
    _ws_name(sp)
    sp.add_argument("--cron", default="0 2 * * *", help="cron schedule (default: '%(default)s', 02:00 daily)")
    sp.add_argument("--timezone", default="UTC", help="time zone of the schedule (default: %(default)s)")
    sp.add_argument("--deployment", help="deployment name (default: atomline-nightly-NAME)")
    sp.add_argument("--dry-run", action="store_true",
                    help="build the deployment and print it, without serving")
    _nightly_options(sp)
    _runner_options(sp)  # a served run uses the same runner a direct run would

    sp = command("history", _run_history, _describe_history,
                 "the accuracy of every evaluation and the promotion gate's decisions")
    sp.add_argument("workspace", help="workspace directory or URL")
    sp.add_argument("name", nargs="?", help="only evaluations of data/NAME")

    sp = command("plots", _run_plots, _describe_plots, "list the stored pictures, or export them as PNG files")
    sp.add_argument("workspace", help="workspace directory or URL")
    sp.add_argument("--export", metavar="DIR", help="write every picture to DIR/<run-id>/<name>.png")

    sp = command("show", _run_show, _describe_show, "list what a workspace holds")
    sp.add_argument("workspace", help="workspace directory or URL")
    return p


def _fault_options(sp: argparse.ArgumentParser, bad_chunks: bool = True) -> None:
    sp.add_argument("--break-lease", action="store_true",
                    help="take the output's write lease even if another run holds it "
                         "(only when you know that run is dead; finished chunks are kept)")
    if bad_chunks:
        _bad_chunk_option(sp)


def _bad_chunk_option(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--on-bad-chunk", choices=("stop", "skip"), default="stop",
                    help="a missing or unreadable input chunk stops the run, or is skipped "
                         "and its rows left out and listed (default: %(default)s)")


def _ws_name(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("workspace", help="workspace directory or URL (memory://…, s3://…)")
    sp.add_argument("name", help="name of the records array (data/NAME)")



def _coder_options(sp: argparse.ArgumentParser, default: str | None = "omp") -> None:
    sp.add_argument("--coder", default=default,
                    help="sparse coder by its trade name, e.g. omp (default: %s)"
                    % (default or "the one the dictionary was trained with"))
    sp.add_argument("--nonzero", type=int, help="nonzeros per patch for greedy coders (option n_nonzero)")
    sp.add_argument("--coder-option", action="append", metavar="KEY=VALUE",
                    help="any other option of the coder, repeatable (e.g. tol=0.01)")


def _train_options(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--atoms", type=int, help="number of atoms k (default: from the records' shape)")
    sp.add_argument("--patch-size", type=int, nargs="+",
                    help="patch length (1-D) or height width (images) (default: from the records' "
                         "shape; vectors are one whole patch)")
    sp.add_argument("--stride", type=int, nargs="+",
                    help="step between patches (default: the given patch size, or from the records' shape)")
    sp.add_argument("--method", default="online", help="dictionary learner (default: %(default)s)")
    sp.add_argument("--learner-option", action="append", metavar="KEY=VALUE",
                    help="any option of the learner, repeatable (e.g. n_passes=2)")
    sp.add_argument("--sample", type=int, help="training patches sampled (default: from the records' shape)")
    sp.add_argument("--seed", type=int, default=0, help="seed (default: %(default)s)")
    _coder_options(sp)


def _pool_options(sp: argparse.ArgumentParser) -> None:
    sp.add_argument("--reduce", choices=("max", "mean"), default="max",
                    help="how each region's coefficients become one number (default: %(default)s)")
    sp.add_argument("--no-split-sign", dest="split_sign", action="store_false",
                    help="pool |z| instead of positive and negative parts separately")
    sp.add_argument("--regions", type=int, nargs="+",
                    help="equal parts per spatial axis of the patch grid (default: from the records' "
                         "shape, within the dictionary's grid)")



#: The evaluate options whose flags are generated from their declarations.
SPLIT_FIELDS = ("split", "test_records", "test_share")


def _evaluation_options(sp: argparse.ArgumentParser) -> None:
    from atomline.stages.options import EvaluateOptions

    sp.add_argument("--labels", help="labels array name (default: NAME)")
    add_option_flags(sp, EvaluateOptions, only=SPLIT_FIELDS)
    sp.add_argument("--folds", type=int, default=5, help="stratified cross-validation folds (default: %(default)s)")
    sp.add_argument("--classifier", choices=("logistic", "linear-svm"), default="logistic",
                    help="linear classifier on standardised features (default: %(default)s)")
    sp.add_argument("--baselines", nargs="*", choices=("raw", "random_patches", "pca"),
                    default=["raw", "random_patches", "pca"],
                    help="feature sets compared with the sparse features (default: all three)")
    sp.add_argument("--curve", type=float, nargs="*", default=[0.05, 0.15, 0.4],
                    help="shares of the training rows on the learning curve; none to skip (default: %(default)s)")
    sp.add_argument("--n-boot", type=int, default=2000, help="bootstrap resamples (default: %(default)s)")
    sp.add_argument("--max-rows", type=int, default=20_000,
                    help="labelled rows used at most, stratified sample (default: %(default)s)")
    sp.add_argument("--class-names", nargs="+", help="names of the classes, in label order, for pictures")
    sp.add_argument("--no-pictures", dest="pictures", action="store_false",
                    help="do not render and store the pictures")



def _nightly_options(sp: argparse.ArgumentParser) -> None:
    from atomline.stages.options import GateOptions

    _train_options(sp)
    _pool_options(sp)
    _evaluation_options(sp)
    add_option_flags(sp, GateOptions)  # --metric, --tolerance, --beat-baselines, --fail-on-regression, --retrain
    sp.add_argument("--retrain-on-drift", action="store_true",
                    help="retrain only when rows from --drift-since on drifted from the earlier ones")
    sp.add_argument("--drift-since", type=int, help="first new row for the drift check")
    sp.add_argument("--drift-threshold", type=float, default=0.2,
                    help="relative change of reconstruction error or nonzeros that counts as drift (default: %(default)s)")
    _fault_options(sp)



def _runner_options(sp: argparse.ArgumentParser) -> None:
    from atomline.stages.options import RunnerOptions

    add_option_flags(sp, RunnerOptions)


def option_flag(field: dataclasses.Field) -> str:
    """The command-line flag of an options field: declared, or ``--<name-with-dashes>``."""
    return field.metadata.get("flag") or "--" + field.name.replace("_", "-")


def add_option_flags(sp: argparse.ArgumentParser, cls: type, only: tuple[str, ...] | None = None) -> None:
    """One flag per field of an options class (``atomline.stages.options``), made from its
    declaration: flag name, type, default, choices and help. Dict fields are repeatable
    ``KEY=VALUE`` flags; a bool is a switch that turns its default around. ``only``: these
    fields alone (for a command whose other flags of the class are still written by hand)."""
    defaults = cls()
    for field in dataclasses.fields(cls):
        if only is not None and field.name not in only:
            continue
        default = getattr(defaults, field.name)
        help_text = field.metadata["help"]
        kind = _kind(field)
        if kind is bool:
            sp.add_argument(option_flag(field), dest=field.name,
                            action="store_false" if default else "store_true", help=help_text)
        elif typing.get_origin(field.type) is tuple:  # tuple[str, ...]: one or more values
            sp.add_argument(option_flag(field), dest=field.name, type=kind, nargs="+",
                            default=default, choices=field.metadata["choices"],
                            help=help_text + " (default: %(default)s)")
        elif kind is dict:
            sp.add_argument(option_flag(field), dest=field.name, action="append", metavar="KEY=VALUE",
                            help=help_text)
        else:
            sp.add_argument(option_flag(field), dest=field.name, type=kind, default=default,
                            choices=field.metadata["choices"],
                            help=help_text + (" (default: %(default)s)" if default is not None else ""))


def options_from_args(cls: type, args: argparse.Namespace):
    """The options object of ``cls`` the parsed flags describe (checked as it is made)."""
    from .commands import _key_values

    values = {f.name: getattr(args, f.name) for f in dataclasses.fields(cls)}
    for field in dataclasses.fields(cls):
        if _kind(field) is dict:
            values[field.name] = _key_values(values[field.name]) or None
    return cls(**values)


def _kind(field: dataclasses.Field) -> type:
    """The value type of a field: ``int`` for ``int``, ``str`` for ``str | None``, ``dict``
    for ``dict[str, Any] | None``."""
    kind = field.type if isinstance(field.type, type) or typing.get_origin(field.type) is dict \
        else next(t for t in typing.get_args(field.type) if t is not type(None))
    return typing.get_origin(kind) or kind
