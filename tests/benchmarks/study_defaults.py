"""Do the shape-derived default settings help on public data, and which alternatives do better?

For each data set, on its TRAIN split only (the test splits are never read), 5-fold
stratified cross-validation compares the raw-records classifier with the sparse features of
the in-memory chain (``SparseCodePooler`` followed by the evaluate stage's classifier) for
the settings of ``default_settings`` and for alternatives that change one value at a time.
It prints one table per data set: accuracy (mean ± standard deviation over folds) and
seconds, then the best setting. Never run by pytest.

Data:

* scikit-learn's ``load_digits`` (8×8 images); its "train split" is a fixed stratified
  75 % (``train_test_split(random_state=0)``), the other 25 % is left untouched.
* The UCR sets shipped inside the sktime 1.2.0 wheel (GunPoint, ArrowHead,
  ItalyPowerDemand, OSULeaf; their ``*_TRAIN.ts`` only), read straight from the wheel by
  the small parser below::

      pip download --no-deps sktime==1.2.0 -d /tmp/wheels
      python tests/benchmarks/study_defaults.py --wheel /tmp/wheels/sktime-1.2.0-py3-none-any.whl

Rows are subsampled (stratified, seeded) to ``--max-rows`` to keep each set near two minutes
on a shared 2-core machine; ``--only digits,GunPoint`` runs some sets.
"""

from __future__ import annotations

import argparse
import time
import zipfile

import numpy as np
from sklearn.datasets import load_digits
from sklearn.model_selection import StratifiedKFold, cross_val_score, train_test_split
from sklearn.pipeline import make_pipeline
from threadpoolctl import threadpool_limits

from atomline.stages.estimator import SparseCodePooler
from atomline.stages.evaluate import make_classifier
from atomline.stages.kernels.shape_rules import Settings, check_settings, default_settings

UCR_SETS = ("GunPoint", "ArrowHead", "ItalyPowerDemand", "OSULeaf")


def parse_ts(text: str) -> tuple[np.ndarray, np.ndarray]:
    """Read an equal-length univariate ``.ts`` file: header lines, ``@data``, then rows.

    Each data row is ``v1,v2,...,vL:label``.

    Returns
    -------
    X : ndarray of shape (n, L), float64
    y : ndarray of shape (n,), int64 (labels numbered in sorted order)
    """
    rows, labels, in_data = [], [], False
    for line in text.splitlines():
        line = line.strip()
        if not line or line.startswith("#"):
            continue
        if not in_data:
            in_data = line.lower() == "@data"
            continue
        values, label = line.rsplit(":", 1)
        if ":" in values:
            raise ValueError("only univariate .ts files are read here")
        rows.append([float(v) for v in values.split(",")])
        labels.append(label.strip())
    lengths = {len(r) for r in rows}
    if len(lengths) != 1:
        raise ValueError(f"series of unequal lengths {sorted(lengths)}")
    classes = sorted(set(labels))
    return np.asarray(rows), np.asarray([classes.index(v) for v in labels], dtype=np.int64)


def ucr_train(wheel: str, name: str) -> tuple[np.ndarray, np.ndarray]:
    """The TRAIN split of one UCR set, read from the sktime wheel (never its TEST split)."""
    with zipfile.ZipFile(wheel) as zf:
        text = zf.read(f"sktime/datasets/data/{name}/{name}_TRAIN.ts").decode()
    return parse_ts(text)


def digits_train() -> tuple[np.ndarray, np.ndarray]:
    """A fixed stratified 75 % of scikit-learn's digits; the rest is never read here."""
    X, y = load_digits(return_X_y=True)
    X_train, _, y_train, _ = train_test_split(X, y, test_size=0.25, stratify=y, random_state=0)
    return X_train, y_train


def subsample(X: np.ndarray, y: np.ndarray, max_rows: int, seed: int = 0):
    if X.shape[0] <= max_rows:
        return X, y
    keep, _ = train_test_split(np.arange(X.shape[0]), train_size=max_rows, stratify=y,
                               random_state=seed)
    keep = np.sort(keep)
    return X[keep], y[keep]


def alternatives(shape: tuple[int, ...], n: int, base: Settings) -> list[tuple[str, Settings]]:
    """Settings that change one value of the defaults (those that cannot work are skipped)."""
    extent = min(shape[:1] if len(shape) == 1 else shape[:2])
    size = base.patch_size[0]
    trials: list[tuple[str, dict]] = [
        ("patch ≈ extent/4", {"patch_size": max(2, extent // 4)}),
        ("patch ≈ extent/2", {"patch_size": max(2, extent // 2)}),
        ("patch ≈ extent/16", {"patch_size": max(2, round(extent / 16))}),
        ("stride = patch/2", {"stride": max(1, size // 2)}),
        ("stride = patch", {"stride": size}),
        ("atoms = 1× d", {"n_atoms": base.patch_dimension}),
        ("atoms = 4× d", {"n_atoms": 4 * base.patch_dimension}),
        ("regions 1", {"regions": 1}),
        ("regions 2", {"regions": 2}),
        ("regions ×2", {"regions": tuple(2 * r for r in base.regions)}),
        ("nonzeros 1", {"n_nonzero": 1}),
        ("nonzeros ×2", {"n_nonzero": 2 * base.n_nonzero}),
    ]
    out = []
    for label, change in trials:
        given = {**_given(base), **change}
        if "patch_size" in change:
            del given["stride"]  # a new patch size takes the default stride rule
        try:
            out.append((label, check_settings(shape, n, **given)))
        except ValueError as exc:
            print(f"  skip {label}: {exc}")
    return out


def _given(s: Settings) -> dict:
    """The defaults as explicit values, so that one changed value leaves the others as they are."""
    return {"patch_size": s.patch_size, "stride": s.stride, "regions": s.regions,
            "n_atoms": s.n_atoms, "n_nonzero": s.n_nonzero, "sample_patches": s.sample_patches}


def pooler(s: Settings) -> SparseCodePooler:
    # The in-memory chain fixes its preprocessing (per-patch normalisation, no whitening),
    # which is also what the defaults choose for signals and images.
    return SparseCodePooler(n_atoms=s.n_atoms, record_shape=s.record_shape, patch_size=s.patch_size,
                            stride=s.stride, regions=s.regions, n_nonzero=s.n_nonzero,
                            sample_patches=s.sample_patches, seed=0)


def study(name: str, X: np.ndarray, y: np.ndarray, shape: tuple[int, ...]) -> list[tuple]:
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    # Each fold's features are learned on that fold's training rows, which are 4/5 of them.
    n_fit = X.shape[0] * 4 // 5
    base = default_settings(shape, n_fit)
    rows = []

    def run(label: str, model) -> None:
        t0 = time.perf_counter()
        acc = cross_val_score(model, X, y, cv=folds)
        rows.append((label, acc.mean(), acc.std(), time.perf_counter() - t0))
        print(f"  {label:<22} {acc.mean():.3f} ± {acc.std():.3f}  {rows[-1][3]:6.1f} s", flush=True)

    print(f"\n{name}: {X.shape[0]} train rows, records {shape}, {np.unique(y).size} classes")
    print(f"  defaults: patch {base.patch_size} stride {base.stride} regions {base.regions} "
          f"atoms {base.n_atoms} nonzeros {base.n_nonzero}")
    run("raw records", make_classifier("logistic"))
    run("defaults", make_pipeline(pooler(base), make_classifier("logistic")))
    for label, s in alternatives(shape, n_fit, base):
        run(f"{label} {_short(s)}", make_pipeline(pooler(s), make_classifier("logistic")))
    best = max(rows, key=lambda r: r[1])
    print(f"  best: {best[0]} ({best[1]:.3f}); defaults − raw = {rows[1][1] - rows[0][1]:+.3f}")
    return rows


def _short(s: Settings) -> str:
    return f"(p{s.patch_size[0]} s{s.stride[0]} r{s.regions[0]} k{s.n_atoms} q{s.n_nonzero})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--wheel", help="path of sktime-1.2.0-py3-none-any.whl (UCR sets)")
    parser.add_argument("--max-rows", type=int, default=1500)
    parser.add_argument("--only", help="comma-separated data set names")
    args = parser.parse_args()
    wanted = set(args.only.split(",")) if args.only else None
    sets = [("digits", digits_train, (8, 8))]
    if args.wheel:
        sets += [(n, (lambda n=n: ucr_train(args.wheel, n)), None) for n in UCR_SETS]
    with threadpool_limits(1):  # a shared 2-core machine: one BLAS thread
        for name, load, shape in sets:
            if wanted and name not in wanted:
                continue
            X, y = subsample(*load(), args.max_rows)
            study(name, X, y, shape or (X.shape[1],))


if __name__ == "__main__":
    main()
