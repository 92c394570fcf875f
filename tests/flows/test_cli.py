"""The ``atomline`` command's errors: one clear message, no traceback, the right exit status.

Mistakes are refused before any flow or Prefect server starts (``flows/preflight.py``);
errors atomline raises on purpose exit 2, unexpected ones exit 1 with a log file, an
interrupt exits 130; ``--json`` prints an error object on stdout.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from atomline.flows import cli
from atomline.stages.workspace import Workspace
from atomline.stages.options import TrainOptions


@pytest.fixture
def no_server(monkeypatch):
    """Fail the test if a command tries to start or reach a Prefect server."""
    from atomline.flows import _server

    def refuse():
        raise AssertionError("a Prefect server was asked for")

    monkeypatch.setattr(_server, "temporary_server", refuse)


def _cli(capsys, *argv: str) -> tuple[int, str, str]:
    try:
        status = cli.main(list(argv))
    except BaseException as exc:  # an escaped error is what the old command did
        status = f"escaped {type(exc).__name__}: {exc}"
    out, err = capsys.readouterr()
    return status, out, err


def test_missing_npy_is_refused_and_leaves_no_workspace(tmp_path, capsys):
    url = str(tmp_path / "new.zarr")
    status, _, err = _cli(capsys, "add-records", url, "vib", str(tmp_path / "absent.npy"))
    assert status == 2
    assert "absent.npy: expected a .npy file, found no such file" in err
    assert not os.path.exists(url)


def test_first_records_refused_leave_no_workspace(tmp_path, capsys):
    X = np.zeros((10, 8), np.float32)
    X[3, 2] = np.nan
    np.save(tmp_path / "nan.npy", X)
    url = str(tmp_path / "new.zarr")
    status, _, err = _cli(capsys, "add-records", url, "vib", str(tmp_path / "nan.npy"))
    assert status == 2 and "row 3: expected finite values" in err
    assert not os.path.exists(url)


def test_csv_given_as_records_is_named_as_such(tmp_path, capsys):
    np.savetxt(tmp_path / "x.csv", np.ones((4, 8)), delimiter=",")
    status, _, err = _cli(capsys, "add-records", str(tmp_path / "ws.zarr"), "vib", str(tmp_path / "x.csv"))
    assert status == 2
    assert "expected a .npy file (numpy.save's binary format)" in err and "numpy.loadtxt" in err
    assert "allow_pickle" not in err
    assert not os.path.exists(tmp_path / "ws.zarr")


def test_csv_given_as_labels_is_named_as_such(labelled, tmp_path, capsys):
    np.savetxt(tmp_path / "y.csv", np.zeros(120), delimiter=",")
    status, _, err = _cli(capsys, "add-labels", labelled, "vib", str(tmp_path / "y.csv"), "--overwrite")
    assert status == 2 and "expected a .npy file" in err and "allow_pickle" not in err


def test_show_pointed_at_a_file(tmp_path, capsys):
    (tmp_path / "notes.txt").write_text("not a workspace")
    status, _, err = _cli(capsys, "show", str(tmp_path / "notes.txt"))
    assert status == 2
    assert err.strip() == (f"atomline: LayoutError: workspace {tmp_path / 'notes.txt'}: expected a "
                           "workspace directory, found a file. Point atomline at the workspace's directory.")


def test_bad_cron_is_refused_before_serving(labelled, capsys, no_server):
    status, out, _ = _cli(capsys, "serve", labelled, "vib", "--cron", "every night", "--json")
    assert status == 2
    error = json.loads(out)
    assert error["error"] == "InputError" and "'every night'" in error["message"]


def test_unknown_time_zone_is_refused_before_serving(labelled, capsys, no_server):
    status, out, err = _cli(capsys, "serve", labelled, "vib", "--timezone", "Mars/Base")
    assert status == 2 and out == ""
    assert err.startswith("atomline: InputError: --timezone: expected an IANA time zone name like "
                          "Europe/Berlin or UTC, found 'Mars/Base'.")
    assert len(err.strip().splitlines()) == 1


PATCHES = ["--patch-size", "128", "--stride", "128"]


@pytest.mark.parametrize("argv, words", [
    (["train", "{ws}", "vib", "--atoms", "-3"], "n_atoms: expected a positive integer, found -3"),
    (["train", "{ws}", "vib", "--patch-size", "5000"], "patch_size: expected 1..2048 on axis 0 (the record's extent), found 5000. Use patch_size ≤ 2048"),
    (["train", "{ws}", "vibration"], "data/vibration: expected an existing records"),
    (["train", "{ws}", "vib", "--coder", "omq"], "coding method: expected one of"),
    (["train", "{ws}", "vib", "--method", "onlin"], "learning method: expected one of"),
    (["train", "{ws}", "vib", "--sample", "10"], "sample_patches: expected at least n_atoms = 128"),
    (["train", "{ws}", "vib", "--workers", "0"], "workers: expected a positive integer, found 0"),
    (["nightly", "{ws}", "vib", "--patch-size", "2048", "--atoms", "8", "--regions", "4"],
     "regions: expected 1..[1] parts per axis"),
    (["encode", "{ws}", "vib"], "expected a promoted dictionary or --dictionary"),
    (["encode", "{ws}", "vib", "--dictionary", "d-absent"], "d-absent"),
    (["nightly", "{ws}", "vib", *PATCHES, "--regions", "40"],
     "regions: expected 1..[16] parts per axis"),
    (["nightly", "{ws}", "vib", *PATCHES, "--folds", "100"], "labels: expected at least two classes with 100 rows each"),
    (["nightly", "{ws}", "vib", *PATCHES, "--tolerance", "-0.1"], "tolerance: expected a margin ≥ 0"),
    (["nightly", "{ws}", "vib", *PATCHES, "--curve", "0.5", "1.5"], "learning_curve: expected shares strictly between 0 and 1"),
    (["nightly", "{ws}", "vib", *PATCHES, "--retrain", "never"], "expected a promoted dictionary (retrain='never')"),
    (["serve", "{ws}", "vib", *PATCHES, "--atoms", "0"], "n_atoms: expected a positive integer, found 0"),
    (["train", "{ws}", "vib", "--learner-option", "n_pases=2"],
     "options of learner 'online': expected option names among ['batch_size', 'checkpoint_every', "
     "'coder', 'coder_options', 'dead_share', 'duplicate_cos', 'forget', 'init', "
     "'n_passes', 'n_sweeps', 'replace_every', 'seed', 'warmup'], found unknown ['n_pases']"),
    (["nightly", "{ws}", "vib", *PATCHES, "--method", "sgd", "--learner-option", "average_decay=2"],
     "options of learner 'sgd': expected option names among ['batch_size', 'checkpoint_every', "
     "'coder', 'coder_options', 'dead_share', 'duplicate_cos', 'init', 'n_passes', 'replace_every', "
     "'seed', 'step', 'step_decay_batches'], found unknown ['average_decay']"),
    (["train", "{ws}", "vib", "--learner-option", "seed=3"],
     "found ['seed'] among the learner options. Give them as their own options (e.g. --seed"),
])
def test_mistakes_refused_before_any_server_starts(labelled, capsys, no_server, argv, words):
    status, out, err = _cli(capsys, *[a.format(ws=labelled) for a in argv])
    assert status == 2, err
    assert words in err
    assert len(err.strip().splitlines()) == 1 and out == ""


def test_train_stage_refuses_a_misspelled_learner_option_before_reading(labelled, monkeypatch):
    from atomline.stages.errors import InputError
    from atomline.stages.train import train_dictionary

    def no_reading(*args, **kwargs):
        raise AssertionError("a chunk was read")

    monkeypatch.setattr(Workspace, "read_chunk", no_reading)
    with pytest.raises(InputError, match=r"options of learner 'averaged-sgd'.*'average_decay'.*"
                                         r"found unknown \['stepsize'\]"):
        train_dictionary(labelled, "vib", options=TrainOptions(n_atoms=8, patch_size=128, stride=128, sample_patches=500, method="averaged-sgd", learner_options={"stepsize": 0.5}))


@pytest.fixture
def trained(labelled, demo_small):
    """The labelled workspace with a dictionary trained by the stage (no Prefect), and
    records of another length beside it."""
    from atomline.stages.train import train_dictionary

    ws = Workspace.open(labelled)
    ws.add_records("short", demo_small[0][:40, :1024], chunk_rows=40)
    dict_id = train_dictionary(ws, "vib", options=TrainOptions(n_atoms=8, patch_size=128, stride=128, sample_patches=500))["dict_id"]
    return labelled, dict_id


@pytest.mark.parametrize("argv, words", [
    (["encode", "{ws}", "vib", "--coder", "omq", "--dictionary", "{d}"], "coding method: expected one of"),
    (["encode", "{ws}", "vib", "--coder-option", "n_nonzeros=3", "--dictionary", "{d}"], "unknown ['n_nonzeros']"),
    (["encode", "{ws}", "short", "--dictionary", "{d}"], "records shaped (2048,), found records 'short' shaped (1024,)"),
    (["pool", "{ws}", "vib", "--regions", "17", "--dictionary", "{d}"], "regions: expected 1..[16] parts per axis"),
    (["evaluate", "{ws}", "vib", "--folds", "1", "--dictionary", "{d}"], "folds: expected at least 2, found 1"),
    (["evaluate", "{ws}", "vib", "--labels", "short", "--dictionary", "{d}"], "labels/short"),
    (["evaluate", "{ws}", "vib", "--split", "test-set", "--test-records", "short", "--dictionary", "{d}"],
     "test records 'short': expected rows of the training records' shape (2048,), found rows of shape (1024,)"),
    (["evaluate", "{ws}", "vib", "--split", "test-set", "--dictionary", "{d}"], "test_records: expected"),
    (["nightly", "{ws}", "vib", "--split", "test-set", "--test-records", "short"], "test records 'short'"),
    (["train", "{ws}", "vib", "--coder-option", "bogus=1"], "options of coder 'omp': expected option names"),
])
def test_mistakes_against_a_dictionary_refused_before_any_server(trained, capsys, no_server, argv, words):
    url, dict_id = trained
    status, out, err = _cli(capsys, *[a.format(ws=url, d=dict_id) for a in argv])
    assert status == 2, err
    assert words in err
    assert len(err.strip().splitlines()) == 1 and out == ""


def test_refusal_in_a_fresh_process_starts_nothing(labelled):
    """Run as a user would, with no Prefect API set: the message alone, no server."""
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}
    done = subprocess.run([sys.executable, "-m", "atomline.flows.cli", "train", labelled, "vib",
                           "--atoms", "-3"], env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 2
    assert done.stderr.strip() == ("atomline: InputError: n_atoms: expected a positive integer, found -3. "
                                   "Ask for at least one atom.")
    assert done.stdout == ""


def test_preflight_does_not_import_prefect():
    """Importing Prefect takes seconds; the checks run without it (serve's cron aside)."""
    done = subprocess.run([sys.executable, "-c", "import sys, atomline.flows.preflight, atomline.flows.cli; "
                           "print(sorted(m for m in sys.modules if m.split('.')[0] == 'prefect'))"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


def test_unexpected_error_gives_a_paragraph_and_a_log(labelled, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("ATOMLINE_LOG_DIR", str(tmp_path / "logs"))

    def broken(self):
        raise ZeroDivisionError("the summary divided by zero")

    monkeypatch.setattr(Workspace, "summary", broken)
    status, _, err = _cli(capsys, "show", labelled)
    assert status == 1
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert "unexpected ZeroDivisionError: the summary divided by zero" in err
    (log,) = (tmp_path / "logs").iterdir()
    assert str(log) in err
    text = log.read_text()
    assert "Traceback" in text and "in broken" in text and "ZeroDivisionError" in text

    status, out, err = _cli(capsys, "show", labelled, "--json")
    error = json.loads(out)
    assert status == 1 and error["error"] == "ZeroDivisionError" and error["exit_status"] == 1
    assert os.path.exists(error["log"])

    status, _, err = _cli(capsys, "show", labelled, "--debug")
    assert status == 1 and "Traceback" in err and "in broken" in err


def test_unexpected_error_with_an_unwritable_log_directory(labelled, tmp_path, capsys, monkeypatch):
    (tmp_path / "file").write_text("")
    monkeypatch.setenv("ATOMLINE_LOG_DIR", str(tmp_path / "file" / "logs"))  # below a file

    def broken(self):
        raise ZeroDivisionError("the summary divided by zero")

    monkeypatch.setattr(Workspace, "summary", broken)
    status, _, err = _cli(capsys, "show", labelled)
    assert status == 1 and "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert "the summary divided by zero" in err and "no log file could be written" in err


def test_debug_shows_the_traceback_of_an_atomline_error(tmp_path, capsys):
    status, _, err = _cli(capsys, "show", str(tmp_path / "absent.zarr"), "--debug")
    assert status == 2 and "Traceback" in err and "NotFound" in err


def test_interrupt_exits_130_with_one_line(labelled, capsys, monkeypatch):
    def interrupted(self):
        raise KeyboardInterrupt

    monkeypatch.setattr(Workspace, "summary", interrupted)
    status, _, err = _cli(capsys, "show", labelled)
    assert status == 130
    assert err.strip() == "atomline: interrupted; finished chunks are kept, a rerun resumes"


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
@pytest.mark.parametrize("own_server", [False, True], ids=["configured-api", "own-server-group"])
def test_ctrl_c_during_serve_exits_130_with_one_line(labelled, own_server):
    """Ctrl-C to the process (configured Prefect API) or to its whole process group (the
    command's own temporary server, as a terminal sends it), while serve is serving."""
    env = dict(os.environ)
    if own_server:
        env.pop("PREFECT_API_URL", None)
    child = subprocess.Popen([sys.executable, "-m", "atomline.flows.cli", "serve", labelled, "vib",
                              *PATCHES, "--atoms", "8"], env=env, start_new_session=own_server,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        before = [child.stderr.readline() for _ in range(2 if own_server else 1)]
        assert before[-1].startswith("serving deployment"), "".join(before) + child.stderr.read()[-3000:]
        # Prefect's serve loop is running by now; it catches the interrupt itself.
        time.sleep(3)
        if own_server:
            os.killpg(child.pid, signal.SIGINT)
        else:
            child.send_signal(signal.SIGINT)
        out, err = child.communicate(timeout=120)
    finally:
        child.kill()
    assert child.returncode == 130, err[-3000:]
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert lines[-1] == "atomline: interrupted; finished chunks are kept, a rerun resumes"
    assert lines.count(lines[-1]) == 1


@pytest.mark.slow
@pytest.mark.usefixtures("prefect_harness")
def test_error_inside_the_nightly_flow_is_one_message(labelled):
    """An error only the run can find (a learner option's value) ends the flow: one message,
    JSON on stdout, and no traceback from Prefect's flow-run logging."""
    done = subprocess.run([sys.executable, "-m", "atomline.flows.cli", "nightly", labelled, "vib",
                           "--atoms", "8", "--patch-size", "128", "--stride", "128", "--sample", "500",
                           "--learner-option", "forget=5", "--json"],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 2, done.stderr[-3000:]
    error = json.loads(done.stdout)
    assert error["error"] == "InputError" and "forget: expected a factor in (0, 1]" in error["message"]
    assert "Traceback" not in done.stderr and "TypeError" not in done.stderr


@pytest.mark.parametrize("text", ["soon", "-5"])
def test_start_timeout_setting_must_be_seconds(monkeypatch, text):
    from atomline.flows import _server
    from atomline.stages.errors import InputError

    monkeypatch.setenv("ATOMLINE_PREFECT_START_TIMEOUT", text)
    with pytest.raises(InputError, match="ATOMLINE_PREFECT_START_TIMEOUT: expected a number of seconds"):
        _server.start_timeout()
    monkeypatch.delenv("ATOMLINE_PREFECT_START_TIMEOUT")
    assert _server.start_timeout() == 300


@pytest.mark.slow
@pytest.mark.parametrize("setting", [{"ATOMLINE_PREFECT_START_TIMEOUT": "0"},
                                     {"PREFECT_HOME": "/dev/null/prefect-home"}],
                         ids=["no-time", "broken-home"])
def test_server_that_cannot_start_gives_one_paragraph(labelled, setting):
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}
    env.update(setting)
    done = subprocess.run([sys.executable, "-m", "atomline.flows.cli", "train", labelled, "vib",
                           "--atoms", "8", "--sample", "500"],
                          env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 2, done.stderr[-3000:]
    starting, message = done.stderr.strip().splitlines()
    assert starting.startswith("atomline: starting a temporary Prefect server")
    assert message.startswith("atomline: PrefectUnavailable: the temporary Prefect server this command "
                              "needs: expected an answer at http://127.0.0.1:")
    assert "prefect server start" in message and "ATOMLINE_PREFECT_START_TIMEOUT" in message
    assert "Traceback" not in done.stderr


@pytest.mark.slow
def test_configured_server_that_does_not_answer(labelled):
    import socket

    with socket.socket() as s:  # a port nothing listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = dict(os.environ, PREFECT_API_URL=f"http://127.0.0.1:{port}/api")
    done = subprocess.run([sys.executable, "-m", "atomline.flows.cli", "train", labelled, "vib",
                           "--atoms", "8", "--sample", "500"],
                          env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 2, done.stderr[-3000:]
    assert done.stderr.strip() == (
        f"atomline: PrefectUnavailable: the Prefect API at PREFECT_API_URL=http://127.0.0.1:{port}/api: "
        "expected a server answering there, found no answer ([Errno 111] Connection refused). Start "
        "that server (`prefect server start`), correct PREFECT_API_URL, or unset it so that the "
        "command starts a temporary server of its own.")


def test_runner_flags_are_made_from_the_runner_options():
    import dataclasses

    from atomline.flows.cli.commands import _runner
    from atomline.flows.cli.parser import option_flag
    from atomline.stages.options import RunnerOptions

    fields = {f.name: f for f in dataclasses.fields(RunnerOptions)}
    commands = cli._parser()._subparsers._group_actions[0].choices
    for command in ("demo", "train", "encode", "pool", "evaluate", "nightly", "serve"):
        actions = {a.dest: a for a in commands[command]._actions if a.dest in fields}
        assert set(actions) == set(fields), command  # every field has its flag, on every flow command
        for name, action in actions.items():
            assert action.option_strings == [option_flag(fields[name])]
            declared = getattr(RunnerOptions(), name)
            assert action.default == declared and action.choices == fields[name].metadata["choices"]
    # Every flag maps back to its field.
    args = cli._parser().parse_args(["encode", "ws", "vib", "--runner", "dask", "--workers", "3",
                                     "--batches-per-worker", "2", "--dask-option", "local_directory=/tmp/x"])
    assert _runner(args) == RunnerOptions(runner="dask", workers=3, batches_per_worker=2,
                                          dask_options={"local_directory": "/tmp/x"})
    args = cli._parser().parse_args(["serve", "ws", "vib", "--runner", "dask", "--dask-address", "tcp://s:8786"])
    assert _runner(args) == RunnerOptions(runner="dask", address="tcp://s:8786")


def test_an_address_without_the_dask_runner_is_refused_before_any_server(labelled, capsys, no_server):
    status, _, err = _cli(capsys, "nightly", labelled, "vib", *PATCHES, "--dask-address", "tcp://s:8786")
    assert status == 2
    assert "address: expected a scheduler address only with runner 'dask'" in err


@pytest.mark.usefixtures("prefect_harness")
def test_serve_runs_the_flow_with_the_workers_asked_for(labelled, monkeypatch, capsys):
    """``serve --workers 16``: each scheduled run cuts 16 workers' batches *and* runs them on
    16 threads. Serving a deployment made Prefect run the flow loaded from its entrypoint,
    which has the decorator's default runner (two threads)."""
    from prefect.runner import Runner

    started = []

    async def record(self, *args, **kwargs):  # stands in for the serve loop, which never ends
        started.append(self)

    monkeypatch.setattr(Runner, "start", record)
    assert cli.main(["serve", labelled, "vib", *PATCHES, "--atoms", "8", "--workers", "16"]) == 0
    (runner,) = started
    registry = runner._deployment_registry
    served = [registry.get_flow(d) for d in registry.get_deployment_ids()]
    assert len(served) == 1 and served[0] is not None, "runs would load the flow from its entrypoint"
    assert served[0].name == "atomline-nightly"
    # Prefect keeps the thread limit private; it is the pool size the runner starts.
    assert served[0].task_runner._max_workers == 16
