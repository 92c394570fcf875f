"""Check a command's arguments against the workspace before anything starts.

The CLI calls one of these before a flow runs and before a temporary Prefect server
starts, so a trivial mistake (a negative ``--atoms``, a patch longer than the records, a
wrong records name, an unknown coder) is refused in a second with the stage's own
message. Every rule is the stage's (``atomline.stages.checks``, ``learning.check_learner``,
``learning.check_learner_options``,
``PatchGeometry``, ``coding.code_width``), applied to the workspace's metadata only: no
chunk is read, nothing is written, and Prefect is not imported (except for ``serve``'s
cron schedule, which only Prefect's parser can judge).

Everything refused here would be refused by the stage too; what passes may still be
refused inside the run (a bad chunk, a lease held by another run).
"""

from __future__ import annotations

from typing import Any

from atomline.stages.checks import (check_curve, check_folds, check_record_shape, check_regions,
                                    check_retrain, check_test_records,
                                    check_sample_size, check_tolerance, check_workers,
                                    promoted_or_named, resolve_coder)
from atomline.stages.errors import InputError, problem
from atomline.stages.kernels.classify import check_training_classes
from atomline.stages.kernels.learning import (TRAIN_OWN_OPTIONS, check_learner, check_learner_options,
                                              default_coder_options, takes_coder)
from atomline.stages.kernels.prep import PatchGeometry
from atomline.stages.options import TrainOptions
from atomline.stages.settings import resolve
from atomline.stages.workspace import Workspace, open_workspace

__all__ = ["check_runner", "check_train", "check_encode", "check_pool", "check_evaluate",
           "check_nightly", "check_cron", "check_timezone"]


def check_runner(workers: int) -> None:
    """Arguments of the task runner."""
    check_workers(workers)


def check_train(workspace: str, records: str, *, n_atoms: int | None, patch_size: Any, stride: Any,
                method: str, coder: str, coder_options: dict | None, sample_patches: int | None,
                learner_options: dict | None = None, preprocessing: dict | None = None,
                **_unchecked: Any) -> PatchGeometry:
    """What the train stage refuses before reading a row; returns the patch geometry.

    Values left out are chosen from the records' shape exactly as the stage chooses them
    (``stages.settings.resolve``), and a configuration that cannot work is refused here.
    ``_unchecked`` takes the remaining train parameters (seed), which only the run itself
    can judge.
    """
    ws = _open(workspace)
    shape = ws.records(records).shape
    check_learner(method, 1 if n_atoms is None else n_atoms)
    check_learner_options(method, learner_options or {}, TRAIN_OWN_OPTIONS)
    if takes_coder(method):
        default_coder_options(coder, coder_options)  # an unknown coder, named as the stage does
    options, _ = resolve(ws, records, TrainOptions(
        n_atoms=n_atoms, patch_size=patch_size, stride=stride, method=method, coder=coder,
        coder_options=coder_options, learner_options=learner_options,
        preprocessing=preprocessing, sample_patches=sample_patches))
    n_atoms = options.n_atoms
    check_sample_size(options.sample_patches, n_atoms)
    geometry = PatchGeometry.for_records(shape[1:], options.patch_size, options.stride)
    if takes_coder(method):
        _check_coder(coder, n_atoms, default_coder_options(coder, options.coder_options))
    return geometry


def check_encode(workspace: str, records: str, *, dict_id: str | None, coder: str | None,
                 coder_options: dict | None) -> None:
    """What the encode stage refuses before coding a chunk."""
    ws = _open(workspace)
    arr = ws.records(records)
    dict_id = promoted_or_named(ws, dict_id)
    stored = ws.load_dictionary(dict_id)
    attrs = stored.attrs
    check_record_shape(dict_id, stored.geometry().record_shape, records, arr.shape[1:])
    coder, options = resolve_coder(attrs, coder, coder_options)
    _check_coder(coder, attrs["n_atoms"], options)


def check_pool(workspace: str, records: str, *, dict_id: str | None, regions: Any) -> None:
    """The pooling regions must fit the dictionary's patch grid."""
    ws = _open(workspace)
    ws.records(records)
    dict_id = promoted_or_named(ws, dict_id)
    if regions is not None:  # otherwise chosen within the grid
        check_regions(ws.load_dictionary(dict_id).geometry().grid, _tuple(regions))


def check_evaluate(workspace: str, records: str, *, dict_id: str | None, labels: str | None,
                   folds: int, learning_curve: list[float], split: str = "kfold",
                   test_records: str | None = None, **_unchecked: Any) -> None:
    """The labels must allow the split asked for (a test set: of the records' shape, with
    labels); the curve's shares be valid."""
    ws = _open(workspace)
    ws.records(records)
    ws.load_dictionary(promoted_or_named(ws, dict_id))
    _check_labels(ws, labels or records, folds, split, records, test_records)
    check_curve(learning_curve)


def check_nightly(workspace: str, records: str, *, retrain: str, tolerance: float, regions: Any,
                  labels: str | None, folds: int, learning_curve: list[float], workers: int,
                  split: str = "kfold", test_records: str | None = None, **train: Any) -> None:
    """Everything the nightly run's stages refuse on their arguments alone.

    ``train`` holds the train parameters and the other nightly ones (gate, drift,
    evaluation options) no rule applies to before the run.
    """
    check_workers(workers)
    check_tolerance(tolerance)
    ws = _open(workspace)
    ws.records(records)
    check_retrain(retrain, ws.promoted, workspace)
    if retrain == "always" or ws.promoted is None:
        grid = check_train(workspace, records, **train).grid
    else:
        grid = ws.load_dictionary(ws.promoted).geometry().grid
    if regions is not None:  # otherwise chosen within the grid
        check_regions(grid, _tuple(regions))
    _check_labels(ws, labels or records, folds, split, records, test_records)
    check_curve(learning_curve)


def check_cron(cron: str, timezone: str) -> None:
    """A schedule Prefect can serve: a known IANA time zone, and an expression Prefect's
    own parser accepts."""
    check_timezone(timezone)
    from prefect.schedules import Cron

    try:
        Cron(cron, timezone=timezone)
    except ValueError as exc:
        raise InputError(problem("--cron/--timezone", "a cron expression of five fields and a time zone "
                                 "name", f"{cron!r} in {timezone!r} ({_first_line(exc)})",
                                 "Use e.g. --cron '0 2 * * *' --timezone UTC.")) from None


def check_timezone(timezone: str) -> None:
    """The zone must be in the IANA database (Prefect's Cron takes any name, and the run
    then fails inside the server)."""
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    try:
        ZoneInfo(timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise InputError(problem("--timezone", "an IANA time zone name like Europe/Berlin or UTC",
                                 repr(timezone), "Use a name from the IANA time zone database "
                                 "(`python -c 'import zoneinfo; print(sorted(zoneinfo.available_timezones()))'` "
                                 "lists them).")) from None


def _open(workspace: str) -> Workspace:
    return open_workspace(workspace)


def _check_coder(coder: str, n_atoms: int, options: dict) -> None:
    # A learned encoder is named by option and loaded by the stage; nothing to size here.
    if coder != "learned":
        from atomline.stages.kernels.coding import code_width

        code_width(coder, n_atoms, **options)


def _check_labels(ws: Workspace, name: str, folds: int, split: str = "kfold",
                  records: str | None = None, test_records: str | None = None) -> None:
    if split == "kfold":
        check_folds(ws.labels(name), folds)
        return
    check_training_classes(ws.labels(name))
    if split == "test-set" and test_records:  # without one, the options refuse the split
        check_test_records(ws, records, test_records)
        ws.labels(test_records)  # the test rows are scored against their own labels


def _first_line(exc: BaseException) -> str:
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


def _tuple(value: Any) -> Any:
    """The CLI gives a list for several values; the stages take tuples."""
    return tuple(value) if isinstance(value, list) else value
