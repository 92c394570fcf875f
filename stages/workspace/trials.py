"""The search's two append-only logs: trials and recipes.

Layout (next to ``evaluations/`` and ``decisions/``, same protocol)::

    trials/<id>/    one group per scored configuration: search id, rung, rows, position,
                    configuration, score, raw score, interval, cost, seconds (attrs)
    recipes/<id>/   one group per stored recipe: name, configuration, where it came from

Each entry is written under its log's lease with ``complete`` last; an unfinished entry
left by a killed writer is removed by the next writer, and readers ignore it. Entries are
never rewritten: a rerun adds new trials under a new search id, and a new recipe of an
existing name supersedes the older one (the latest complete recipe of a name is the one
in force; :func:`current_recipe` without a name gives the latest of any name).

Example::

    >>> from atomline.stages.workspace import Workspace
    >>> from atomline.stages.workspace.trials import append_trial, trials
    >>> ws = Workspace.open("memory://trials-doc", create=True)
    >>> _ = append_trial(ws, {"search_id": "s1", "rung": 0, "score": 0.9})
    >>> [t["score"] for t in trials(ws, "s1")]
    [0.9]
"""

from __future__ import annotations

import datetime as _dt
import os

from . import Workspace
from .layout import _now, _plain
from ..errors import InputError, NotFound, problem

__all__ = ["append_trial", "trials", "search_ids", "save_recipe", "recipes", "current_recipe"]


def _append(ws: Workspace, log: str, prefix: str, attrs: dict) -> str:
    with ws._append_lease(log):
        ws._remove_unfinished(log)
        stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%S%f")
        entry = f"{prefix}{stamp}-{os.urandom(3).hex()}"
        g = ws.root.require_group(log).create_group(entry)
        g.attrs.update(_plain(dict(attrs, id=entry, created=_now())))
        g.attrs["complete"] = True
    return entry


def _entries(ws: Workspace, log: str) -> list[dict]:
    if log not in ws.root:
        return []
    out = []
    for k in ws.root[log].group_keys():
        try:
            out.append(dict(ws.root[f"{log}/{k}"].attrs))
        except (ValueError, TypeError, KeyError):
            continue  # unreadable metadata of an unfinished entry
    return sorted((a for a in out if a.get("complete") is True), key=lambda a: a["id"])


def append_trial(ws: Workspace, attrs: dict) -> str:
    """Record one trial under ``trials/<id>`` (append-only).

    Parameters
    ----------
    ws : Workspace
    attrs : dict
        Plain JSON: ``search_id``, ``rung``, ``rows``, ``position``, ``configuration``,
        ``score``, ``raw``, ``low``, ``high``, ``cost``, ``seconds``.

    Returns
    -------
    str
        The trial id.
    """
    if "search_id" not in attrs:
        raise InputError(problem("trial", "a search_id", f"keys {sorted(attrs)}",
                                 "Name the search the trial belongs to."))
    return _append(ws, "trials", "t", attrs)


def trials(ws: Workspace, search_id: str | None = None) -> list[dict]:
    """Complete trials, oldest first; those of one search when ``search_id`` is given."""
    return [t for t in _entries(ws, "trials") if search_id is None or t["search_id"] == search_id]


def search_ids(ws: Workspace) -> list[str]:
    """Ids of the searches with trials, in the order their first trial was recorded."""
    return list(dict.fromkeys(t["search_id"] for t in _entries(ws, "trials")))


def save_recipe(ws: Workspace, name: str, configuration: dict, source: dict) -> str:
    """Store a named recipe under ``recipes/<id>`` (append-only; the latest of a name wins).

    Parameters
    ----------
    ws : Workspace
    name : str
        The recipe's name (letters, digits, ``-_.``).
    configuration : dict
        Plain JSON, as the search's trials carry it.
    source : dict
        Where it came from: search id, trial id, records, labels, score, raw score.

    Returns
    -------
    str
        The recipe entry id.
    """
    if not name or not all(c.isalnum() or c in "-_." for c in name):
        raise InputError(problem("recipe name", "letters, digits, '-', '_' or '.'", repr(name),
                                 "Pick a plain name such as 'digits-best'."))
    return _append(ws, "recipes", "r", {"name": name, "configuration": configuration,
                                         "source": source})


def recipes(ws: Workspace) -> list[dict]:
    """Every complete recipe entry, oldest first."""
    return _entries(ws, "recipes")


def current_recipe(ws: Workspace, name: str | None = None) -> dict | None:
    """The recipe in force: the latest of ``name``, or the latest of any name; None if none.

    Raises
    ------
    NotFound
        ``name`` is given and no recipe has it.
    """
    found = [r for r in recipes(ws) if name is None or r["name"] == name]
    if not found:
        if name is None:
            return None
        raise NotFound(problem(f"recipes/{name}", "a stored recipe of that name",
                               f"names {sorted({r['name'] for r in recipes(ws)})}",
                               "Run `atomline search` first, or pick a listed name."))
    return found[-1]
