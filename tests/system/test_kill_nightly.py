"""SIGKILL the `atomline nightly` command at chosen store writes, rerun it, and compare the
history and the workspace with an uninterrupted run's.

The kill mechanism is the kill matrix's (``test_kill_matrix.py``): the child wraps
``LocalStore.set`` and SIGKILLs itself just before (or just after) the N-th write whose
key matches a pattern. Here the child runs the whole command line, ``main(["nightly",
...])``, on a second night (a dictionary is promoted already), so the kills land in
training, encoding, both evaluations, the pictures, the decision and around the
pointer move. The reruns run the same command in this process.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import textwrap

import pytest
from conftest import store_snapshot

from atomline.flows.cli import main
from atomline.stages.workspace import Workspace

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("prefect_harness")]

COMMON = ["--patch-size", "128", "--stride", "128", "--sample", "1000", "--nonzero", "3",
          "--regions", "2", "--folds", "3", "--baselines", "--curve", "--n-boot", "100",
          "--workers", "1", "--json"]
FIRST = ["--atoms", "12"] + COMMON
#: The second night: another dictionary, a tolerance wide enough that it is promoted.
SECOND = ["--atoms", "16", "--tolerance", "0.5"] + COMMON

_CHILD = textwrap.dedent("""
    import os, re, signal, sys
    from zarr.storage import LocalStore

    pattern, nth, when, argv = re.compile(sys.argv[1]), int(sys.argv[2]), sys.argv[3], sys.argv[4:]
    seen = 0
    _set = LocalStore.set

    async def set_and_maybe_die(self, key, value, *args, **kwargs):
        global seen
        hit = bool(pattern.search(key))
        if hit:
            seen += 1
        if hit and seen == nth and when == "before":
            os.kill(os.getpid(), signal.SIGKILL)
        result = await _set(self, key, value, *args, **kwargs)
        if hit and seen == nth:
            os.kill(os.getpid(), signal.SIGKILL)
        return result

    LocalStore.set = set_and_maybe_die
    from atomline.flows.cli import main
    main(argv)
    sys.exit(3)  # the kill point was never reached
""")

# (key pattern, n-th matching write, die before or after it, what the point is)
KILLS = [
    (r"dictionaries/[^/]+/zarr\.json$", 2, "before", "candidate's atoms written, attributes not"),
    (r"codes/[^/]+/vib/done/c/", 2, "before", "candidate's codes: chunk 1's data written, flag not"),
    (r"evaluations/[^/]+/confusion_features/", 1, "before", "candidate's evaluation arrays half written"),
    (r"evaluations/[^/]+/zarr\.json$", 3, "before", "candidate's evaluation written, complete not"),
    (r"evaluations/[^/]+/zarr\.json$", 5, "before", "promoted one's evaluation unfinished"),
    (r"reports/[^/]+/[^/]+/zarr\.json$", 4, "before", "a picture's bytes stored, attributes not"),
    (r"decisions/[^/]+/zarr\.json$", 2, "after", "decision's attributes written, complete not"),
    (r"^zarr\.json$", 1, "before", "decision complete, pointer not moved"),
    (r"^zarr\.json$", 1, "after", "pointer moved, command not finished"),
]


def _nightly(url: str, args: list[str], capsys) -> dict:
    capsys.readouterr()
    assert main(["nightly", url, "vib"] + args) == 0
    return json.loads(capsys.readouterr().out)


def _history(url: str) -> dict:
    """The evaluations and decisions, without their ids and times."""
    ws = Workspace.open(url)
    drop = {"run_id", "decision_id", "created", "candidate_run", "promoted_run", "key"}
    return {"evaluations": [{k: v for k, v in e.items() if k not in drop} for e in ws.evaluations()],
            "decisions": [{k: v for k, v in d.items() if k not in drop} for d in ws.decisions()],
            "promoted": ws.promoted}


def _without_times(doc):
    if isinstance(doc, dict):
        return {k: _without_times(v) for k, v in doc.items() if k != "created"}
    if isinstance(doc, list):
        return [_without_times(v) for v in doc]
    return doc


def _normalised(url: str) -> dict[str, bytes]:
    """Every key and its bytes, with run ids renamed by their order and times left out.

    Leases are left out (a killed holder's stale lease is taken over, not necessarily
    removed), and so are the bytes and size of the history picture, whose axis labels
    show when each evaluation was made (its attributes are kept).
    """
    ws = Workspace.open(url)
    ids = {}
    for log, letter in (("evaluations", "E"), ("decisions", "D")):
        for i, name in enumerate(sorted(ws.root[log].group_keys()) if log in ws.root else []):
            ids[name] = f"{letter}{i}"
    out = {}
    for key, value in store_snapshot(ws).items():
        if key.startswith(".leases/"):
            continue
        history = re.search(r"^reports/[^/]+/history/", key)
        if key.endswith("zarr.json"):
            doc = _without_times(json.loads(value))
            value = json.dumps(doc["attributes"] if history else doc, sort_keys=True).encode()
        elif history:
            value = b"(history picture)"
        for old, new in ids.items():
            key = key.replace(old, new)
            value = value.replace(old.encode(), new.encode())
        out[key] = value
    return out


def test_killed_nightly_reruns_to_the_uninterrupted_history(tmp_path, demo_small, capsys):
    X, y = demo_small
    night1 = str(tmp_path / "night1.zarr")
    ws = Workspace.open(night1, create=True)
    ws.add_records("vib", X[:120], chunk_rows=30)
    ws.add_labels("vib", y[:120])
    first = _nightly(night1, FIRST, capsys)
    assert first["outcome"] == "first"
    children = []
    for i, (pattern, nth, when, point) in enumerate(KILLS):
        url = str(tmp_path / f"kill-{i}.zarr")
        shutil.copytree(night1, url)
        child = subprocess.Popen([sys.executable, "-c", _CHILD, pattern, str(nth), when, "nightly", url,
                                  "vib"] + SECOND, env=_child_env(),
                                 stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        children.append((url, point, child))
    reference = str(tmp_path / "reference.zarr")
    shutil.copytree(night1, reference)
    ref = _nightly(reference, SECOND, capsys)
    assert ref["outcome"] == "promoted" and ref["promoted_id"] == ref["candidate_id"]
    ref_history, ref_store = _history(reference), _normalised(reference)
    assert [d["outcome"] for d in ref_history["decisions"]] == ["first", "promoted"]
    assert [e["tag"] for e in ref_history["evaluations"]] == ["candidate", "candidate", "promoted"]

    for url, point, child in children:
        _, err = child.communicate(timeout=300)
        assert child.returncode == -signal.SIGKILL, f"{point}: {err.decode()[-2000:]}"
        assert Workspace.open(url).promoted in (first["promoted_id"], ref["candidate_id"]), point
        again = _nightly(url, SECOND, capsys)
        assert (again["outcome"], again["promoted_id"]) == ("promoted", ref["candidate_id"]), point
        assert _history(url) == ref_history, point
        assert _normalised(url) == ref_store, point
    # Once more after the last point: the recorded decision is reported, nothing is added.
    assert _nightly(url, SECOND, capsys)["already_decided"] == again["decision_id"]
    assert _normalised(url) == ref_store


def _child_env() -> dict:
    """The children use this session's Prefect API instead of starting their own server."""
    from prefect.settings import PREFECT_API_URL

    return dict(os.environ, PREFECT_API_URL=PREFECT_API_URL.value())
