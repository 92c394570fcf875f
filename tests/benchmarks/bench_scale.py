"""Scale benchmark: encode throughput per task runner and worker count, against bare numpy.

Run as a script (pytest does not collect ``bench_*.py``)::

    python tests/benchmarks/bench_scale.py                 # 4M rows per runner, 10M-row run
    python tests/benchmarks/bench_scale.py --rows 200000 --big-rows 0   # quick look

Prints one table per measurement, every figure from this run:

* encode rows/s for 1 and 2 workers with the threads, processes and Dask runners (whole
  flow wall time, runner start-up included), the cores kept busy (CPU seconds of every
  thread over wall time: bare processes, and the flow process of the thread runner), and
  the speed-up of 2 workers over 1 as a
  ratio to the speed-up two bare numpy processes reach doing the same coder work
  (normalise + OMP on the same rows, same BLAS threads per worker; goal ≥ 0.9); bare
  numpy and the thread runner are medians of ``--repeats`` rounds run side by side;
* orchestration share at the default batch plan: 1 − Σ task seconds / (workers × flow
  wall) — time the workers were not inside an encode task (goal ≤ 5 %) — over the whole
  flow run and over the part after the first task started (Prefect's own timestamps), so
  that the worker start-up a process or Dask runner pays per flow run is shown apart;
  ``dask-warm`` is an existing cluster, as a scheduler address gives in production;
* how each part of encoding a chunk (read, prepare, code, commit) scales from one to
  two threads of one process;
* peak RSS of the ``atomline encode`` command on 1× and 10× the rows (goal: within 10 %);
* rows/s for a ``--big-rows``-row, 64-dimensional archive (default ten million), with the
  thread runner and an existing Dask cluster.

The records are invented: sparse combinations of random unit atoms plus noise (a
benchmark load, not data). The dictionary is learned from them by the train stage.
"""

from __future__ import annotations

import argparse
import logging
import multiprocessing as mp
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="atomline-bench-prefect-"))
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "ERROR")

import numpy as np  # noqa: E402
from atomline.stages.options import TrainOptions

D, K, NONZERO = 64, 128, 5
BLOCK = 500_000  # rows generated and appended at a time (128 MB of float32)


def synthetic_block(start: int, n: int, seed: int = 7) -> np.ndarray:
    """Rows ``start … start+n`` of the benchmark load: 5 random atoms each, plus noise.

    Returns
    -------
    ndarray of shape (n, 64), float32
    """
    rng = np.random.default_rng([seed, start])
    gen = np.random.default_rng(seed)
    W = gen.standard_normal((K, D))
    W /= np.linalg.norm(W, axis=1, keepdims=True)
    idx = rng.integers(0, K, (n, NONZERO))
    coef = rng.standard_normal((n, NONZERO))
    X = np.einsum("nk,nkd->nd", coef, W[idx]) + 0.05 * rng.standard_normal((n, D))
    return X.astype(np.float32)


def fill_records(ws, name: str, n_rows: int) -> None:
    """Add ``n_rows`` benchmark rows to ``data/<name>``, streamed in blocks (add, then append)."""
    for start in range(0, n_rows, BLOCK):
        block = synthetic_block(start, min(BLOCK, n_rows - start))
        if start == 0:
            ws.add_records(name, block)
        else:
            ws.append_records(name, block)


# ---------------------------------------------------------------------------- bare numpy
def _bare_worker(args):
    """One bare process: normalise and OMP-code its rows, chunk by chunk, after a barrier."""
    barrier, start, n, atoms, prep_attrs, prep_arrays, blas, chunk, out = args
    from threadpoolctl import threadpool_limits

    from atomline.stages.kernels.coding import code
    from atomline.stages.kernels.prep import Normaliser

    normaliser = Normaliser.from_stored(prep_attrs, prep_arrays)
    # Block by block, as fill_records wrote them (the same rows when start is a multiple
    # of BLOCK), and without the (n, 5, 64) float64 temporary of one big block.
    X = np.concatenate([synthetic_block(s, min(BLOCK, start + n - s)) for s in range(start, start + n, BLOCK)])
    atoms = atoms.astype(X.dtype)
    barrier.wait()
    t0, c0 = time.perf_counter(), time.process_time()
    with threadpool_limits(limits=blas):
        for s in range(0, n, chunk):
            code(normaliser.apply(X[s : s + chunk]), atoms, "omp", n_nonzero=NONZERO)
    out.put((time.perf_counter() - t0, time.process_time() - c0))


def bare_seconds(n_procs: int, n_rows: int, stored, blas: int, chunk: int) -> tuple[float, float]:
    """Wall time for ``n_procs`` spawned processes sharing ``n_rows`` rows equally.

    Also the cores they kept busy: their CPU seconds (every thread) over that wall time.
    """
    ctx = mp.get_context("spawn")
    barrier, out = ctx.Barrier(n_procs), ctx.Queue()
    share = n_rows // n_procs
    procs = [ctx.Process(target=_bare_worker, args=((barrier, i * share, share, stored.atoms,
                                                      stored.attrs["preprocessing"], stored.arrays,
                                                      blas, chunk, out),))
             for i in range(n_procs)]
    for p in procs:
        p.start()
    times = [out.get() for _ in procs]  # (wall, CPU seconds of all the process's threads)
    for p in procs:
        p.join()
    wall = max(t for t, _ in times)
    return wall, sum(c for _, c in times) / wall


# ---------------------------------------------------------------------------- flows
def empty_flow_seconds() -> float:
    """Wall time of calling a Prefect flow that does nothing (after one first call).

    Prefect's own cost per flow run in the calling process (creating and finishing the
    run through the API): part of every flow wall time below, independent of atomline.
    """
    from prefect import flow

    @flow(name="atomline-bench-empty")
    def empty() -> None:
        return None

    empty()
    t0 = time.perf_counter()
    empty()
    return time.perf_counter() - t0


def warm_dask_encode(url: str, dict_id: str, workers: int, scratch: str, name: str = "sig") -> dict:
    """Encode through an existing local Dask cluster, after one warm-up run on a small array."""
    from dask.distributed import LocalCluster

    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                      dashboard_address=":0", local_directory=scratch) as cluster:
        run_encode(url, "warm", dict_id, "dask", workers, scratch, cluster.scheduler_address)
        return run_encode(url, name, dict_id, "dask", workers, scratch, cluster.scheduler_address)


def run_encode(url: str, name: str, dict_id: str, kind: str, workers: int, scratch: str,
               address: str | None = None) -> dict:
    """One encode flow run; wall time here, task times from the flow and from Prefect's API.

    From the times Prefect recorded: ``startup``, how long after the flow run started its
    first task run started (the plan and, for process and Dask runners that start their
    own workers, the worker start-up each such flow run pays); ``span``, first task start
    to last task end; ``tail``, last task end to the flow run's end.
    """
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId

    from atomline.flows import encode_flow
    from atomline.flows.runners import task_runner
    from atomline.stages.options import RunnerOptions

    runner = task_runner(kind, workers, address, dask_options={"local_directory": scratch})
    t0, c0 = time.perf_counter(), os.times()
    state = encode_flow.with_options(task_runner=runner)(
        url, name, dict_id=dict_id, runner=RunnerOptions(workers=workers), overwrite=True,
        return_state=True)
    wall, c1 = time.perf_counter() - t0, os.times()
    summary = state.result()
    run_id = state.state_details.flow_run_id
    with get_client(sync_client=True) as client:
        flow_run = client.read_flow_run(run_id)
        tasks = client.read_task_runs(flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[run_id])))
    first = min(t.start_time for t in tasks if t.start_time is not None)
    last = max(t.end_time for t in tasks if t.end_time is not None)
    return {"wall": wall, "rows": summary["records"], "task_seconds": summary["task_seconds"],
            "phase": summary["seconds"], "encoded": summary["encoded"], "tasks": len(tasks),
            "startup": (first - flow_run.start_time).total_seconds(),
            "span": (last - first).total_seconds(),
            "tail": (flow_run.end_time - last).total_seconds(),
            # CPU of this process's threads over the wall time: the work itself with the
            # thread runner (other runners work in other processes).
            "cores": ((c1.user - c0.user) + (c1.system - c0.system)) / wall}


def thread_scaling_of_parts(url: str, name: str, dict_id: str, n_chunks: int = 28) -> list[list]:
    """Each part of encoding a chunk, on ``n_chunks`` chunks, in 1 thread and then 2 threads.

    Read (``read_chunk``), prepare (patches, normalise), code (OMP) and commit (three
    arrays and the flag): which parts two worker threads of one process do side by side.
    """
    from concurrent.futures import ThreadPoolExecutor

    from threadpoolctl import threadpool_limits

    from atomline.stages import encode
    from atomline.stages.kernels.coding import code
    from atomline.stages.kernels.prep import Normaliser, PatchGeometry
    from atomline.stages.workspace import Workspace

    ws = Workspace.open(url)
    arr, stored = ws.records(name), ws.load_dictionary(dict_id)
    normaliser = Normaliser.from_stored(stored.attrs["preprocessing"], stored.arrays)
    atoms = stored.atoms.astype(arr.dtype)
    encode.prepare_encode(ws, name, dict_id, overwrite=True)
    out = ws.output(encode.codes_path(dict_id, name))
    geometry = PatchGeometry.from_attrs(out.attrs["geometry"])
    rows = int(arr.chunks[0])
    blocks = [ws.read_chunk(name, c, arr) for c in range(n_chunks)]
    coded = [code(normaliser.apply(geometry.extract(b)), atoms, "omp", n_nonzero=NONZERO)
             for b in blocks]
    parts = {
        "read": lambda c: ws.read_chunk(name, c, arr),
        "prepare": lambda c: normaliser.apply(geometry.extract(blocks[c])),
        "code": lambda c: code(blocks[c], atoms, "omp", n_nonzero=NONZERO),
        "commit": lambda c: out.commit(c, slice(c * rows, (c + 1) * rows), {
            "index": coded[c].index.astype(np.int32), "value": coded[c].value.astype(np.float32),
            "count": coded[c].count.astype(np.int32)}),
    }

    def run(part, chunks):
        with threadpool_limits(limits=1):
            for c in chunks:
                part(c)

    table_rows = []
    for label, part in parts.items():
        run(part, range(2))
        t0 = time.perf_counter()
        run(part, range(n_chunks))
        one = time.perf_counter() - t0
        t0 = time.perf_counter()
        with ThreadPoolExecutor(2) as pool:
            list(pool.map(lambda cs: run(part, cs), [range(0, n_chunks, 2), range(1, n_chunks, 2)]))
        two = time.perf_counter() - t0
        table_rows.append([label, f"{1000 * one / n_chunks:.1f}", f"{1000 * two / n_chunks:.1f}",
                           f"{one / two:.2f}"])
    return table_rows


# The child's own high-water mark. Not getrusage's ru_maxrss: Linux carries the forking
# parent's resident size into the child's maxrss across exec, which would report this
# benchmark's process instead of the child.
_PEAK = ("import re; peak = lambda: float(re.search(r'VmHWM:\\s+(\\d+)', "
         "open('/proc/self/status').read()).group(1)) / 1024\n")


def rss_of_cli_encode(url: str, name: str, dict_id: str, workers: int) -> float:
    """Peak RSS (MiB) of an ``atomline encode`` process on ``data/<name>``."""
    from prefect.settings import PREFECT_API_URL

    code = (f"import sys; from atomline.flows.cli import main\n{_PEAK}"
            f"rc = main(['encode', {url!r}, {name!r}, '--dictionary', {dict_id!r}, "
            f"'--workers', '{workers}', '--overwrite', '--json']); "
            "print('RSS', peak(), file=sys.stderr); sys.exit(rc)")
    env = dict(os.environ, PREFECT_API_URL=PREFECT_API_URL.value())
    done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(done.stderr[-3000:])
    line = [ln for ln in done.stderr.splitlines() if ln.startswith("RSS ")][-1]
    return float(line.split()[1])


def rss_of_stage_encode(url: str, name: str, dict_id: str, workers: int) -> tuple[float, float]:
    """Peak RSS (MiB) of a process running only the encode stage in ``workers`` threads.

    The same batches and BLAS limits as the flow, without Prefect, whose own peak (which
    grows with the API's history) would otherwise hide the data path. Returns the peak
    before encoding (imports, workspace, plan) and the peak after.
    """
    code = f"""
import sys
from concurrent.futures import ThreadPoolExecutor
from atomline.flows.runners import blas_threads, plan_batches
from atomline.stages import encode
{_PEAK}
prepared = encode.prepare_encode({url!r}, {name!r}, {dict_id!r}, overwrite=True)
batches = plan_batches(prepared["pending"], {workers}, 4)
before = peak()
with ThreadPoolExecutor({workers}) as pool:
    list(pool.map(lambda b: encode.encode_chunks({url!r}, {name!r}, {dict_id!r}, b,
                                                 blas_threads=blas_threads({workers})), batches))
print("RSS", before, peak())
"""
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(done.stderr[-3000:])
    line = [ln for ln in done.stdout.splitlines() if ln.startswith("RSS ")][-1]
    return float(line.split()[1]), float(line.split()[2])


OVERHEAD_HEADER = ["runner", "workers", "tasks", "flow wall s", "before first task s", "tasks span s",
                   "after last task s", "task s", "share of flow wall", "share of tasks span"]


def overhead_row(kind: str, workers: int, r: dict) -> list:
    """Where a flow run's time went: the share of worker time spent outside encode tasks.

    Of the whole flow run (start-up and plan included), and of the span from the first
    task's start to the last one's end (per-task orchestration and the idle tail of the
    last batch; the worker start-up of process and Dask runners is before it).
    """
    share = 1 - r["task_seconds"] / (workers * r["wall"])
    steady = 1 - r["task_seconds"] / (workers * r["span"])
    return [kind, workers, r["tasks"], f"{r['wall']:.1f}", f"{r['startup']:.1f}", f"{r['span']:.1f}",
            f"{r['tail']:.1f}", f"{r['task_seconds']:.1f}", f"{100 * share:.1f} %", f"{100 * steady:.1f} %"]


def table(title: str, header: list[str], rows: list[list]) -> None:
    print(f"\n{title}")
    widths = [max(len(str(h)), *(len(str(r[i])) for r in rows)) for i, h in enumerate(header)]
    print("  ".join(str(h).ljust(w) for h, w in zip(header, widths)))
    print("  ".join("-" * w for w in widths))
    for r in rows:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths)))
    sys.stdout.flush()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=4_000_000, help="rows per runner measurement")
    parser.add_argument("--rss-rows", type=int, default=200_000, help="1x rows for the RSS check")
    parser.add_argument("--big-rows", type=int, default=10_000_000, help="rows of the large run (0: skip)")
    parser.add_argument("--repeats", type=int, default=3,
                        help="interleaved rounds of bare numpy and thread-runner runs (medians)")
    parser.add_argument("--runners", default="threads,processes,dask,dask-warm",
                        help="dask: a local cluster started by the runner; dask-warm: an existing one")
    parser.add_argument("--big-runners", default="threads,dask-warm",
                        help="runners for the large archive, e.g. threads,dask")
    parser.add_argument("--keep", help="directory for the workspace (default: a temporary one, removed)")
    args = parser.parse_args()

    from atomline.flows._server import temporary_server

    for noisy in ("distributed", "distributed.scheduler", "distributed.nanny", "distributed.core",
                  "distributed.worker", "distributed.http.proxy"):
        logging.getLogger(noisy).setLevel(logging.ERROR)

    from atomline.flows.runners import blas_threads
    from atomline.stages.train import train_dictionary
    from atomline.stages.workspace import Workspace

    base = args.keep or tempfile.mkdtemp(prefix="atomline-bench-scale-")
    url, scratch = os.path.join(base, "ws.zarr"), os.path.join(base, "dask")
    os.makedirs(scratch, exist_ok=True)
    print(f"atomline scale benchmark — {os.cpu_count()} cores, numpy {np.__version__}, workspace {url}")
    print(f"records: {D}-dimensional, dictionary {K} atoms, OMP with {NONZERO} nonzeros")
    with temporary_server():  # PREFECT_API_URL if set, else a server for the benchmark's length
        ws = Workspace.open(url, create=True)
        t0 = time.perf_counter()
        fill_records(ws, "sig", args.rows)
        chunk = ws.describe_records("sig")["chunk_rows"]
        print(f"wrote {args.rows:,} rows in {time.perf_counter() - t0:.1f} s "
              f"({ws.describe_records('sig')['n_chunks']} chunks of {chunk} rows)")
        dict_id = train_dictionary(ws, "sig", options=TrainOptions(n_atoms=K, sample_patches=20_000, seed=0, coder_options={"n_nonzero": NONZERO}))["dict_id"]
        stored = ws.load_dictionary(dict_id)

        # Bare numpy (same coder work, same BLAS threads per worker as the flow gives it) and
        # the thread runner, interleaved round by round: two vCPUs here scale differently
        # from minute to minute, so the ratio compares medians measured side by side.
        fill_records(ws, "warm", 4 * chunk)
        run_encode(url, "warm", dict_id, "threads", 1, scratch)  # first-use costs, see below
        bare = {1: [], 2: []}
        threaded = {1: [], 2: []}
        for _ in range(args.repeats):
            for w in (1, 2):
                bare[w].append(bare_seconds(w, args.rows, stored, blas_threads(w), chunk))
                threaded[w].append(run_encode(url, "sig", dict_id, "threads", w, scratch))
        (bare1, cores1), (bare2, cores2) = (
            tuple(float(v) for v in np.median(np.array(bare[w]), axis=0)) for w in (1, 2))
        bare_speedup = bare1 / bare2
        rounds = ", ".join(f"{b1[0] / b2[0]:.2f}" for b1, b2 in zip(bare[1], bare[2]))
        table(f"bare numpy processes (normalise + OMP, no I/O, no Prefect; median of {args.repeats})",
              ["processes", "BLAS threads each", "rows/s", "cores busy", "speed-up", "speed-up per round"],
              [[1, blas_threads(1), f"{args.rows / bare1:,.0f}", f"{cores1:.2f}", "1.00", ""],
               [2, blas_threads(2), f"{args.rows / bare2:,.0f}", f"{cores2:.2f}", f"{bare_speedup:.2f}",
                rounds]])

        rows = []
        overhead_rows = []
        for kind in args.runners.split(","):
            if kind == "threads":  # the run of median wall time of each worker count
                res = {w: sorted(threaded[w], key=lambda r: r["wall"])[len(threaded[w]) // 2]
                       for w in (1, 2)}
            elif kind == "dask-warm":  # a long-lived cluster: workers already imported everything
                res = {w: warm_dask_encode(url, dict_id, w, scratch) for w in (1, 2)}
            else:
                # One small run first, so that this process's own first-use costs (Prefect's
                # first flow run, loading the kernels) are not charged to a worker count.
                run_encode(url, "warm", dict_id, kind, 1, scratch)
                res = {w: run_encode(url, "sig", dict_id, kind, w, scratch) for w in (1, 2)}
            speedup = res[1]["wall"] / res[2]["wall"]
            for w in (1, 2):
                r = res[w]
                rows.append([kind, w, f"{r['rows'] / r['wall']:,.0f}", f"{r['rows'] / r['phase']:,.0f}",
                             f"{r['cores']:.2f}" if kind == "threads" else "",
                             f"{speedup:.2f}" if w == 2 else "",
                             f"{speedup / bare_speedup:.2f}" if w == 2 else ""])
                overhead_rows.append(overhead_row(kind, w, r))
        table(f"encode flow, {args.rows:,} rows, default batches (4 per worker); threads: median "
              f"of {args.repeats}, the others one run",
              ["runner", "workers", "rows/s (flow wall)", "rows/s (encode phase)",
               "cores busy (flow process)", "speed-up 2/1",
               "speed-up / bare (goal >= 0.9)"], rows)
        table("orchestration share = 1 - task seconds / (workers x time) (goal <= 5 %)",
              OVERHEAD_HEADER, overhead_rows)
        print(f"(an empty Prefect flow run costs {empty_flow_seconds():.2f} s of flow wall here)")
        table("parts of encoding one chunk, 1 then 2 threads of one process (one BLAS thread each)",
              ["part", "ms per chunk, 1 thread", "ms per chunk, 2 threads", "speed-up"],
              thread_scaling_of_parts(url, "sig", dict_id))

        n1 = args.rss_rows
        fill_records(ws, "rss1", n1)
        fill_records(ws, "rss10", 10 * n1)
        rss1 = rss_of_cli_encode(url, "rss1", dict_id, 2)
        rss10 = rss_of_cli_encode(url, "rss10", dict_id, 2)
        (pre1, st1), (pre10, st10) = (rss_of_stage_encode(url, n, dict_id, 2) for n in ("rss1", "rss10"))
        table("peak RSS, separate processes, 2 worker threads (goal: 10x rows within 10 %)",
              ["rows", "`atomline encode` MiB", "ratio", "stage only: before MiB", "stage only: peak MiB",
               "ratio"],
              [[f"{n1:,}", f"{rss1:.0f}", "1.00", f"{pre1:.0f}", f"{st1:.0f}", "1.00"],
               [f"{10 * n1:,}", f"{rss10:.0f}", f"{rss10 / rss1:.3f}", f"{pre10:.0f}", f"{st10:.0f}",
                f"{st10 / st1:.3f}"]])

        if args.big_rows:
            t0 = time.perf_counter()
            fill_records(ws, "big", args.big_rows)
            written = time.perf_counter() - t0
            big_rows = []
            for kind in args.big_runners.split(","):
                if kind == "dask-warm":
                    big = warm_dask_encode(url, dict_id, 2, scratch, name="big")
                else:
                    big = run_encode(url, "big", dict_id, kind, 2, scratch)
                big_rows.append([kind, 2, f"{written:.0f}", f"{big['rows'] / big['wall']:,.0f}",
                                 *overhead_row(kind, 2, big)[2:]])
            table(f"large archive: {args.big_rows:,} rows x {D} (measured, not extrapolated)",
                  ["runner", "workers", "write s", "rows/s (flow wall)", *OVERHEAD_HEADER[2:]], big_rows)
    if not args.keep:
        shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    main()
