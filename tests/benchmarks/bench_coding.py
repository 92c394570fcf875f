"""Speed of every coder as a ratio to the floor (one product ``X @ atoms.T``) and to
scikit-learn's ``sparse_encode`` with the matching algorithm; one worker (BLAS pinned to
one thread, numba kernels are single-threaded).

Run: ``python tests/benchmarks/bench_coding.py [--rows 20000] [--repeats 3]``.
Not part of the test suite (the file name does not match ``test_*.py``).

Each cell is the median over repeats; within a repeat the floor and every coder run
one after the other on the same data (interleaved), so load on the machine hits all
alike. scikit-learn's encoders loop over rows in Python and are timed on a subset of
rows (``--sk-rows``) and scaled linearly to the full row count, which their per-row
loop makes fair. Rows are synthetic: 8 random atoms per row plus Gaussian noise
(invented for timing only).

The floor is BLAS's ``X @ atoms.T`` on one thread; the coders form that product with their
own fixed-order loops (``stages/kernels/coding/_rows.py``, row-invariant on every CPU), whose ratio
to the floor is the ``fixed-order X·Wᵀ`` line: part of every coder's ratio.

Quality column: for lasso coders, the mean relative excess of the objective over the
exact (LARS) solution, measured on the scikit-learn subset (``sk`` after it: the same
for scikit-learn's coder); for ``learned``, the relative code error against converged
FISTA, ``‖Z − Z*‖² / ‖Z*‖²``, next to FISTA's after 3 and 30 steps.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings

import numpy as np
from sklearn.decomposition import sparse_encode
from threadpoolctl import threadpool_limits

from atomline.stages.kernels.coding import code, fit_learned_encoder, lambda_for_sparsity
from atomline.stages.kernels.coding._rows import product


def _timed(fn):
    start = time.perf_counter()
    out = fn()
    return time.perf_counter() - start, out


def _rows(rng, n, W, noise=0.1):
    k, d = W.shape
    Z = np.zeros((n, k))
    cols = np.argsort(rng.random((n, k)), axis=1)[:, :8]
    np.put_along_axis(Z, cols, rng.standard_normal((n, 8)), axis=1)
    return Z @ W + noise * rng.standard_normal((n, d))


def _objective(X, W, Z, lam):
    return 0.5 * np.sum((X - Z @ W) ** 2, axis=1) + lam * np.abs(Z).sum(axis=1)


def run(rows: int, repeats: int, sk_rows: int, train_steps: int) -> None:
    rng = np.random.default_rng(0)
    lines = []
    for d, k in ((64, 256), (192, 1024)):
        W64 = rng.standard_normal((k, d))
        W64 /= np.linalg.norm(W64, axis=1, keepdims=True)
        X64 = _rows(rng, rows, W64)
        lam = lambda_for_sparsity(X64[:1000], W64, 10.0)
        encoder = fit_learned_encoder(X64[:4000], W64, "fista", 3, lam=lam, gap_tol=1e-8,
                                      max_iter=5000, n_steps=train_steps, seed=0)
        for dtype in (np.float64, np.float32):
            X = X64.astype(dtype)
            W = W64.astype(dtype)
            Xs = X[:sk_rows]
            coders = [
                ("omp s=5", "omp", {"n_nonzero": 5}, ("omp", {"n_nonzero_coefs": 5})),
                ("omp s=10", "omp", {"n_nonzero": 10}, ("omp", {"n_nonzero_coefs": 10})),
                ("ormp s=10", "ormp", {"n_nonzero": 10}, ("omp", {"n_nonzero_coefs": 10})),
                ("mp s=10", "mp", {"n_nonzero": 10}, ("omp", {"n_nonzero_coefs": 10})),
                ("cosamp s=10", "cosamp", {"n_nonzero": 10}, ("omp", {"n_nonzero_coefs": 10})),
                ("block-omp 2x4", "block-omp", {"group_size": 4, "n_groups": 2},
                 ("omp", {"n_nonzero_coefs": 8})),
                ("lars ~10nz", "lars", {"lam": lam}, ("lasso_lars", {"alpha": lam})),
                ("fista gap 1e-4", "fista", {"lam": lam, "gap_tol": 1e-4},
                 ("lasso_cd", {"alpha": lam})),
                ("ista gap 1e-4", "ista", {"lam": lam, "gap_tol": 1e-4},
                 ("lasso_cd", {"alpha": lam})),
                ("fista 3 steps", "fista", {"lam": lam, "gap_tol": 0.0, "max_iter": 3}, None),
                ("fista 30 steps", "fista", {"lam": lam, "gap_tol": 0.0, "max_iter": 30}, None),
                ("learned 3 layers", "learned", {"encoder": encoder}, None),
                ("threshold", "threshold", {"alpha": 0.5}, ("threshold", {"alpha": 0.5})),
                ("threshold split", "threshold", {"alpha": 0.5, "split_sign": True}, None),
                ("triangle", "triangle", {}, None),
                ("hard", "hard", {}, None),
            ]
            times = {name: [] for name, *_ in coders}
            sk_times = {name: [] for name, *_ in coders}
            floor = []
            fixed = []  # the coders' own row-invariant product, against the BLAS floor
            product(X[:4], W.T)  # compile (or load) it outside the timings
            outputs = {}
            for _ in range(repeats):
                fixed.append(_timed(lambda: product(X, W.T))[0])
                for name, method, opts, sk in coders:
                    floor.append(_timed(lambda: X @ W.T)[0])
                    t, out = _timed(lambda: code(X, W, method, **opts))
                    times[name].append(t)
                    outputs[name] = out
                    if sk is not None:
                        with warnings.catch_warnings():
                            warnings.simplefilter("ignore")
                            t, sk_out = _timed(lambda: sparse_encode(
                                Xs, W, algorithm=sk[0], **sk[1]))
                        sk_times[name].append(t * rows / sk_rows)
                        outputs["sk " + name] = sk_out
            f = float(np.median(floor))
            exact = code(Xs, W, "lars", lam=lam).dense().astype(np.float64)
            best = _objective(Xs.astype(np.float64), W64, exact, lam)
            target = code(X, W, "fista", lam=lam, gap_tol=1e-8, max_iter=5000).dense()
            for name, method, opts, sk in coders:
                t = float(np.median(times[name]))
                nnz = float(outputs[name].count.mean())
                vs_sk = f"{np.median(sk_times[name]) / t:9.1f}x" if sk else f"{'-':>10}"
                quality = ""
                if method in ("lars", "fista", "ista") and "steps" not in name:
                    ours = outputs[name].dense()[:sk_rows].astype(np.float64)
                    q = np.mean(_objective(Xs, W64, ours, lam) / best - 1)
                    quality = f"obj +{q:.1e}"
                    if sk:
                        theirs = outputs["sk " + name].astype(np.float64)
                        q = np.mean(_objective(Xs, W64, theirs, lam) / best - 1)
                        quality += f", sk +{q:.1e}"
                if method == "learned" or "steps" in name:
                    Z = outputs[name].dense()
                    quality = f"code err {np.sum((Z - target) ** 2) / np.sum(target ** 2):.3f}"
                lines.append(f"{d:>4} {k:>5} {np.dtype(dtype).name:>8}  {name:<17} "
                             f"{t / f:8.2f}x {vs_sk} {nnz:7.1f}  {quality}")
                print(lines[-1], file=sys.stderr, flush=True)  # progress
            lines.append(f"{d:>4} {k:>5} {np.dtype(dtype).name:>8}  {'fixed-order X·Wᵀ':<17} "
                         f"{np.median(fixed) / f:8.2f}x")
            lines.append(f"{d:>4} {k:>5} {np.dtype(dtype).name:>8}  {'(floor seconds)':<17} "
                         f"{f:9.4f}")
    header = (f"{'d':>4} {'k':>5} {'dtype':>8}  {'coder':<17} {'vs floor':>9} "
              f"{'sk/ours':>10} {'mean nz':>7}  quality")
    print(f"rows={rows}, repeats={repeats} (median), one worker; scikit-learn timed on "
          f"{sk_rows} rows and scaled; lam for ~10 nonzeros by lambda_for_sparsity")
    print(header)
    print("-" * len(header))
    print("\n".join(lines))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=20000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--sk-rows", type=int, default=300)
    parser.add_argument("--train-steps", type=int, default=400)
    args = parser.parse_args()
    with threadpool_limits(1):
        run(args.rows, args.repeats, args.sk_rows, args.train_steps)


if __name__ == "__main__":
    main()
