"""Properties every coder keeps: the
layout's invariants, finite output, bounded width; hypothesis explores shapes/dtypes."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from atomline.stages.kernels.coding import METHODS, code, code_width

K, D = 24, 10
OPTIONS = {
    "mp": {"n_nonzero": 4},
    "omp": {"n_nonzero": 4},
    "ormp": {"n_nonzero": 4},
    "cosamp": {"n_nonzero": 3},
    "lars": {"lam": 0.3},
    "ista": {"lam": 0.3},
    "fista": {"lam": 0.3},
    "threshold": {"alpha": 0.3},
    "triangle": {},
    "hard": {},
    "block-omp": {"group_size": 3, "n_groups": 2},
}


def _atoms(rng, k, d, dtype=np.float64):
    W = rng.standard_normal((k, d))
    return (W / np.linalg.norm(W, axis=1, keepdims=True)).astype(dtype)


def test_every_method_is_covered():
    assert set(OPTIONS) | {"learned"} == set(METHODS)


# Row invariance (chunking, place, alignment, CPU kind): tests/kernels/test_row_invariance.py.


def _check_layout(c, width, n_rows):
    assert c.index.shape == c.value.shape == (n_rows, width)
    assert np.isfinite(c.value).all()
    used = c.index >= 0
    np.testing.assert_array_equal(used.sum(axis=1), c.count)
    # Used slots come first, name distinct atoms in range; unused slots are empty.
    np.testing.assert_array_equal(used, np.arange(width)[None, :] < c.count[:, None])
    assert np.all(c.index[used] < c.n_atoms)
    assert np.all(c.value[~used] == 0)
    for row in c.index:
        row = row[row >= 0]
        assert len(set(row.tolist())) == row.size


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1),
       k=st.integers(1, 30),
       d=st.integers(1, 20),
       n=st.integers(1, 12),
       dtype=st.sampled_from([np.float32, np.float64]),
       method=st.sampled_from(sorted(OPTIONS)),
       duplicate=st.booleans(),
       zero_rows=st.booleans(),
       scale=st.sampled_from([1e-3, 1.0, 1e3]))
def test_codes_are_finite_bounded_and_well_formed(seed, k, d, n, dtype, method, duplicate,
                                                   zero_rows, scale):
    rng = np.random.default_rng(seed)
    W = _atoms(rng, k, d, dtype)
    if duplicate and k >= 2:
        W[k - 1] = W[0]  # an exact duplicate atom
    X = (scale * rng.standard_normal((n, d))).astype(dtype)
    if zero_rows:
        X[:: 2] = 0
    opts = dict(OPTIONS[method])
    if method == "block-omp":
        opts["group_size"] = 1 if k % 3 else 3
    if method in ("lars", "ista", "fista", "threshold"):
        key = "alpha" if method == "threshold" else "lam"
        opts[key] = 0.3 * scale
    c = code(X, W, method, **opts)
    width = code_width(method, k, **opts)
    _check_layout(c, width, n)
    if "n_nonzero" in opts:
        assert c.count.max() <= opts["n_nonzero"]
    if zero_rows and method not in ("triangle", "hard"):
        assert np.all(c.count[::2] == 0)


def test_compiled_kernels_are_not_cached_beside_the_installed_source(tmp_path):
    # A cache written into an installed package's folder outlives `pip uninstall` and turns
    # the folder into a namespace package that shadows a later editable install.
    import subprocess
    import sys

    env = {k: v for k, v in __import__("os").environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path)
    out = subprocess.run([sys.executable, "-c",
                          "import numba, atomline.stages.kernels.coding as c; print(numba.config.CACHE_DIR)"],
                         env=env, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == str(tmp_path / "atomline" / "numba")


def test_every_compiled_kernel_releases_the_gil():
    # The thread runner codes batches in threads of one process; a kernel that held the
    # GIL would run them one at a time (seen: 2 threads at 1.03x one). numba's
    # dispatchers keep the compile options they were made with.
    import importlib
    import pkgutil

    import numba.core.registry

    import atomline.stages.kernels.coding as coding

    kernels = {}
    for info in pkgutil.iter_modules(coding.__path__):
        module = importlib.import_module(f"{coding.__name__}.{info.name}")
        for name, obj in vars(module).items():
            if isinstance(obj, numba.core.registry.CPUDispatcher) and obj.__module__ == module.__name__:
                kernels[f"{info.name}.{name}"] = obj.targetoptions.get("nogil", False)
    assert "_common.orthogonal_pursuit" in kernels and len(kernels) >= 15
    assert [name for name, nogil in kernels.items() if not nogil] == []
