"""Rules on the stages' arguments, shared by the stages and the CLI's preflight.

Each function here is the one place its rule is written: the stage calls it where it
needs the argument, and ``atomline.flows.preflight`` calls it before any flow (or Prefect
server) starts, so a mistake is refused in a second with the same message. Nothing here
imports Prefect, reads chunks or writes to a workspace.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError, NotFound, problem
# Rules that belong to a kernel are written there and listed here for the preflight.
from .kernels.classify import check_folds
from .kernels.pooling import check_regions

__all__ = ["check_workers", "check_sample_size", "check_regions", "check_curve", "check_folds",
           "check_tolerance", "check_record_shape", "check_test_records", "promoted_or_named", "resolve_coder",
           "check_retrain"]


def check_workers(workers: int) -> None:
    """Refuse a worker count below one."""
    if workers < 1:
        raise InputError(problem("workers", "a positive integer", str(workers), "Use --workers 1 or more."))


def check_sample_size(sample_patches: int, n_atoms: int) -> None:
    """A training sample needs at least as many patches as atoms."""
    if sample_patches < n_atoms:
        raise InputError(problem("sample_patches", f"at least n_atoms = {n_atoms}",
                                 str(sample_patches), "Sample more patches or ask for fewer atoms."))


def check_curve(learning_curve: tuple[float, ...] | list[float]) -> None:
    """Shares of the training rows on the learning curve lie strictly between 0 and 1."""
    if any(not 0 < s < 1 for s in learning_curve):
        raise InputError(problem("learning_curve", "shares strictly between 0 and 1",
                                 str(list(learning_curve)), "Use e.g. 0.1, 0.25, 0.5."))


def check_tolerance(tolerance: float) -> None:
    """The promotion gate's margin is not negative."""
    if tolerance < 0:
        raise InputError(problem("tolerance", "a margin ≥ 0", str(tolerance), "Use e.g. 0.01."))


def check_test_records(ws, records: str, test_records: str) -> None:
    """A test set is other records with rows of the records' shape (so the dictionary that
    codes the records codes them too). Reads metadata only.

    Parameters
    ----------
    ws : Workspace
    records, test_records : str
        The training records and the test records named by ``--test-records``.
    """
    if test_records == records:
        raise InputError(problem("test_records", "records other than the evaluated ones",
                                 repr(test_records), "Name a separate test set, or use --split kfold."))
    train_shape = tuple(ws.records(records).shape[1:])
    test_shape = tuple(ws.records(test_records).shape[1:])
    if test_shape != train_shape:
        raise InputError(problem(f"test records {test_records!r}",
                                 f"rows of the training records' shape {train_shape}",
                                 f"rows of shape {test_shape}",
                                 "Score a test set of the same width and shape as the records."))


def promoted_or_named(ws, dict_id: str | None) -> str:
    """The dictionary a command works on: the one named, else the promoted one.

    Raises
    ------
    NotFound
        None named and none promoted.
    """
    if dict_id:
        return dict_id
    if ws.promoted is None:
        raise NotFound(problem(f"workspace {ws.url}", "a promoted dictionary or --dictionary",
                               "none promoted", "Run the nightly flow, or name a dictionary."))
    return ws.promoted


def check_record_shape(dict_id: str, record_shape: tuple[int, ...], records: str,
                       shape: tuple[int, ...]) -> None:
    """Records coded with a dictionary have the record shape it was trained on."""
    if tuple(shape) != tuple(record_shape):
        raise InputError(problem(f"dictionary {dict_id}", f"records shaped {tuple(record_shape)}",
                                 f"records {records!r} shaped {tuple(shape)}",
                                 "Train a dictionary on records of this shape."))


def resolve_coder(stored_attrs: dict, coder: str | None, coder_options: dict | None) -> tuple[str, dict]:
    """The coder and options an encode run uses: by default the dictionary's own.

    With no ``coder`` or the dictionary's own, its training options, the given ones
    changing only what they name; another coder gets only the options given.
    """
    if coder is None or coder == stored_attrs["coder"]:
        coder = stored_attrs["coder"]
        coder_options = {**stored_attrs["coder_options"], **(coder_options or {})}
    return coder, dict(coder_options or {})


def check_retrain(retrain: str, promoted: str | None, workspace: str) -> None:
    """``retrain='never'`` needs a dictionary already promoted."""
    if retrain == "never" and promoted is None:
        raise NotFound(problem(f"workspace {workspace}", "a promoted dictionary (retrain='never')",
                               "none promoted", "Run once with retrain='if-missing' or 'always'."))
