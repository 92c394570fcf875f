"""Benchmark: our online learner against scikit-learn's MiniBatchDictionaryLearning.

Run as ``python tests/benchmarks/bench_learning.py`` (not collected by ``pytest``: the
file name does not match ``test_*.py``). Prints one table.

Planted data: a random 256 × 64 dictionary (Gaussian entries, unit rows), 100 000 rows
each a combination of 5 atoms with N(0, 1) coefficients, plus white noise at 20 dB.
scikit-learn runs two passes (``max_iter=2``, its faster ``fit_algorithm="cd"``,
early stopping off) with the lasso penalty ``λ``; ``λ = 0.15`` gives about 5 nonzeros
per row on the planted dictionary (printed). Ours runs ``online`` with OMP at 5
nonzeros, snapshotting the atoms through the checkpoint callback (the snapshot costs
one copy; evaluation happens after the run, outside the timed section).

Two objectives, each evaluated identically for both dictionaries on the same 4 000
training rows:

* ``lasso``: mean of ``½‖x − Wᵀz‖² + λ‖z‖₁`` with scikit-learn's own lasso coder
  (``sparse_encode(..., "lasso_cd", alpha=λ)``) — the objective scikit-learn minimises;
* ``l0``: mean of ``½‖x − Wᵀz‖²`` with our OMP at 5 nonzeros — the objective we minimise.

"time to reach" is the first snapshot time at which our dictionary's objective is at or
below scikit-learn's final one. Recovery: share of planted atoms with a learned atom at
|cos| > 0.99.

Memory: subprocesses train from Zarr arrays of ``N`` and ``10 N`` rows streamed chunk by
chunk (online learner, one pass; and reservoir sample + in-memory learning) and report
their peak RSS (``resource.getrusage``).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

K, D, S, LAM, SNR_DB = 256, 64, 5, 0.15, 20.0


def planted(n_rows: int, seed: int = 0, offset: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Planted dictionary (K, D) and ``n_rows`` signals; rows depend on (seed, offset)."""
    W = np.random.default_rng(seed).standard_normal((K, D))
    W /= np.linalg.norm(W, axis=1, keepdims=True)
    rng = np.random.default_rng([seed, offset])
    Z = np.zeros((n_rows, K))
    support = np.argsort(rng.random((n_rows, K)), axis=1)[:, :S]
    Z[np.arange(n_rows)[:, None], support] = rng.standard_normal((n_rows, S))
    X = Z @ W
    noise_var = S / D / 10 ** (SNR_DB / 10)  # signal variance per entry is S/D
    return W, X + rng.standard_normal(X.shape) * np.sqrt(noise_var)


def recovered(W_true: np.ndarray, W: np.ndarray) -> float:
    return float(np.mean(np.abs(W_true @ W.T).max(axis=1) > 0.99))


def l0_objective(X: np.ndarray, W: np.ndarray) -> float:
    from atomline.stages.coding import code

    Z = code(X, W, "omp", n_nonzero=S).dense()
    R = X - Z @ W
    return float(0.5 * np.einsum("ij,ij->", R, R) / X.shape[0])


def lasso_objective(X: np.ndarray, W: np.ndarray) -> float:
    from sklearn.decomposition import sparse_encode

    Z = sparse_encode(X, W, algorithm="lasso_cd", alpha=LAM)
    R = X - Z @ W
    return float((0.5 * np.einsum("ij,ij->", R, R) + LAM * np.abs(Z).sum()) / X.shape[0])


def first_reaching(snaps: list[tuple[float, np.ndarray]], target: float, objective) -> float:
    """Earliest snapshot time with objective ≤ target (binary search: the trace decreases)."""
    lo, hi = 0, len(snaps) - 1
    if objective(snaps[hi][1]) > target:
        return float("nan")
    while lo < hi:
        mid = (lo + hi) // 2
        if objective(snaps[mid][1]) <= target:
            hi = mid
        else:
            lo = mid + 1
    return snaps[lo][0]


def compare(n_rows: int, sklearn_passes: int) -> list[tuple[str, str, str, str]]:
    from sklearn.decomposition import MiniBatchDictionaryLearning, sparse_encode

    from atomline.stages.learning import learn

    W_true, X = planted(n_rows)
    probe = X[np.random.default_rng(9).choice(n_rows, 4000, replace=False)]
    nnz = (sparse_encode(probe[:1000], W_true, algorithm="lasso_cd", alpha=LAM) != 0).sum(1)
    print(f"λ = {LAM}: {nnz.mean():.2f} nonzeros per row on the planted dictionary")

    t0 = time.perf_counter()
    theirs = MiniBatchDictionaryLearning(
        n_components=K, alpha=LAM, max_iter=sklearn_passes, fit_algorithm="cd",
        batch_size=256, tol=0.0, max_no_improvement=None, random_state=0,
    ).fit(X)
    t_theirs = time.perf_counter() - t0
    W_theirs = theirs.components_ / np.linalg.norm(theirs.components_, axis=1, keepdims=True)

    snaps: list[tuple[float, np.ndarray]] = []
    t0 = time.perf_counter()

    def snapshot(state: dict) -> None:
        snaps.append((time.perf_counter() - t0, state["atoms"]))

    ours = learn(X, K, "online", holdout=0, coder_options={"n_nonzero": S}, batch_size=1024,
                 n_passes=2, seed=0, checkpoint=snapshot, checkpoint_every=4)
    t_ours = time.perf_counter() - t0 - 0.0
    snaps.append((t_ours, ours.atoms))

    rows = []
    for name, objective in (("lasso (theirs)", lambda W: lasso_objective(probe, W)),
                            ("l0 / OMP-5 (ours)", lambda W: l0_objective(probe, W))):
        target = objective(W_theirs)
        reach = first_reaching(snaps, target, objective)
        rows.append((f"objective {name}: sklearn after {sklearn_passes} passes / ours final",
                     f"{target:.4f}", f"{objective(ours.atoms):.4f}",
                     f"ours reaches it at {reach:.1f} s = {reach / t_theirs:.3f} × sklearn time"))
    rows.insert(0, (f"training time, {n_rows} × {D}, k = {K}", f"{t_theirs:.1f} s",
                    f"{t_ours:.1f} s (2 passes)", f"ratio ours/sklearn {t_ours / t_theirs:.3f}"))
    rows.append(("planted atoms recovered |cos| > 0.99", f"{recovered(W_true, W_theirs):.1%}",
                  f"{recovered(W_true, ours.atoms):.1%}", "goal ≥ 90%"))
    return rows


def write_archive(path: str, n_rows: int, chunk: int) -> None:
    import zarr

    arr = zarr.open_array(store=path, mode="w", shape=(n_rows, D), chunks=(chunk, D),
                          dtype="float32")
    for start in range(0, n_rows, chunk):
        stop = min(start + chunk, n_rows)
        arr[start:stop] = planted(stop - start, offset=start)[1].astype(np.float32)


def rss_worker(path: str, mode: str) -> None:
    """Train from a Zarr array streamed chunk by chunk; print peak RSS in MiB and rows."""
    import zarr

    from atomline.stages.learning import learn, reservoir_sample

    arr = zarr.open_array(store=path, mode="r")
    chunk = arr.chunks[0]

    def stream():
        for start in range(0, arr.shape[0], chunk):
            yield arr[start : start + chunk]

    if mode == "online":
        learn(stream(), K, "online", coder_options={"n_nonzero": S}, seed=0)
    else:
        sample = reservoir_sample(stream(), 20_000, seed=0)
        learn(sample, K, "online", coder_options={"n_nonzero": S}, batch_size=1024, seed=0)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: KiB
    print(json.dumps({"peak_mib": peak, "rows": int(arr.shape[0])}))


def memory(n_small: int) -> list[tuple[str, str, str, str]]:
    tmp = tempfile.mkdtemp(prefix="atomline-bench-learning-")
    try:
        paths = {}
        for n in (n_small, 10 * n_small):
            paths[n] = os.path.join(tmp, f"archive-{n}.zarr")
            write_archive(paths[n], n, chunk=10_000)
        rows = []
        for mode in ("online", "reservoir"):
            peaks = {}
            for n, path in paths.items():
                out = subprocess.run([sys.executable, __file__, "--rss-worker", path, mode],
                                     check=True, capture_output=True, text=True).stdout
                peaks[n] = json.loads(out.strip().splitlines()[-1])["peak_mib"]
            small, big = peaks[n_small], peaks[10 * n_small]
            what = ("streamed online, one pass" if mode == "online"
                    else "reservoir 20 000 rows, then online")
            rows.append((f"peak RSS, {what}: {n_small} rows / {10 * n_small} rows",
                         f"{small:.0f} MiB", f"{big:.0f} MiB",
                         f"+{big / small - 1:.1%} (goal ≤ +10%)"))
        return rows
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--sklearn-passes", type=int, default=2)
    parser.add_argument("--memory-rows", type=int, default=50_000)
    parser.add_argument("--rss-worker", nargs=2, metavar=("PATH", "MODE"))
    args = parser.parse_args()
    if args.rss_worker:
        rss_worker(*args.rss_worker)
        return
    rows = compare(args.rows, args.sklearn_passes) + memory(args.memory_rows)
    widths = [max(len(r[i]) for r in rows + [HEADER]) for i in range(4)]
    for r in [HEADER] + rows:
        print(" | ".join(c.ljust(w) for c, w in zip(r, widths)))


HEADER = ("measure", "scikit-learn | N rows", "atomline | 10 N rows", "ratio / goal")

if __name__ == "__main__":
    main()
