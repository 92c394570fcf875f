"""A row's codes depend on that row alone: on its neighbours, its place, its memory address,
the BLAS thread count and the CPU's vector width they do not.

References: IEEE 754 makes every elementwise ``*`` and ``+`` correctly rounded, so numpy's
elementwise loops give the same bits on every SIMD path; a product summed left to right
with one rounding per operation must equal that loop bit for bit. Eigenvalue references
come from LAPACK through ``numpy.linalg.eigvalsh``.

`.ci/run` runs this file again under other CPU settings (numpy's AVX2/AVX-512 paths
disabled, OpenBLAS forced to older kernels, numba compiling for a generic x86-64); the
pinned digests in ``fixtures/row_digests.json`` must hold under every one
(``python tests/kernels/test_row_invariance.py`` rewrites them).
"""

from __future__ import annotations

import hashlib
import json
import os
import pathlib

import numpy as np
import pytest
from threadpoolctl import threadpool_limits

from atomline.stages.kernels.coding import METHODS, code, code_width, fit_learned_encoder, gram
from atomline.stages.kernels.coding._common import lipschitz
from atomline.stages.kernels.coding._rows import product, product_blocks, row_energies, row_means
from atomline.stages.kernels.prep import Normaliser

FIXTURES = pathlib.Path(__file__).resolve().parents[2] / "fixtures"
K, D = 24, 10
OPTIONS = {
    "mp": {"n_nonzero": 4}, "omp": {"n_nonzero": 4}, "ormp": {"n_nonzero": 4},
    "cosamp": {"n_nonzero": 3}, "lars": {"lam": 0.3}, "ista": {"lam": 0.3},
    "fista": {"lam": 0.3}, "threshold": {"alpha": 0.3}, "triangle": {}, "hard": {},
    "block-omp": {"group_size": 3, "n_groups": 2},
}


def _sequential(X, M):
    """numpy's elementwise loop: acc = acc + x_t · m_t, t = 0, 1, … (the bitwise reference)."""
    acc = np.zeros((X.shape[0], M.shape[1]), dtype=X.dtype)
    for t in range(X.shape[1]):
        acc = acc + X[:, t:t + 1] * M[t][None, :]
    return acc


def _unit_atoms(rng, k, d):
    W = rng.standard_normal((k, d))
    return W / np.sqrt(row_energies(W))[:, None]


def _misaligned(X):
    """The same values at an address 4 bytes off every usual alignment."""
    raw = np.zeros(X.nbytes + 64, dtype=np.uint8)
    start = (-raw.ctypes.data) % 64 + 4
    out = raw[start:start + X.nbytes].view(X.dtype).reshape(X.shape)
    out[...] = X
    assert out.ctypes.data % 8 == 4
    return out


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("n, d, m", [(1, 1, 1), (7, 3, 5), (13, 64, 33), (40, 17, 100)])
def test_product_is_the_left_to_right_sum_bit_for_bit(n, d, m, dtype):
    rng = np.random.default_rng(n * d + m)
    X = rng.standard_normal((n, d)).astype(dtype)
    M = rng.standard_normal((d, m)).astype(dtype)
    ref = _sequential(X, M)
    assert product(X, M).tobytes() == ref.tobytes()
    blocks = np.concatenate([b.copy() for _, _, b in product_blocks(X, M)])
    assert blocks.tobytes() == ref.tobytes()
    # And it is the product: against BLAS to float rounding.
    np.testing.assert_allclose(ref, X.astype(np.float64) @ M, rtol=0, atol=1e-4 * d)


def test_row_sums_are_left_to_right_in_float64():
    rng = np.random.default_rng(5)
    X = rng.standard_normal((9, 13)).astype(np.float32)
    X64 = X.astype(np.float64)
    energy, total = np.zeros(9), np.zeros(9)
    for t in range(13):
        energy = energy + X64[:, t] * X64[:, t]
        total = total + X64[:, t]
    assert row_energies(X).tobytes() == energy.astype(np.float32).tobytes()
    assert row_means(X).tobytes() == (total / 13).astype(np.float32).tobytes()


def test_gram_and_step_do_not_depend_on_the_blas_thread_count():
    # Measured before: atoms @ atoms.T differed by up to 1.19e-7 between 1 and 2 OpenBLAS
    # threads, and encode computed it outside any thread limit.
    rng = np.random.default_rng(0)
    atoms = _unit_atoms(rng, 512, 144).astype(np.float32)
    seen = set()
    for threads in (1, 2):
        with threadpool_limits(limits=threads):
            seen.add((gram(atoms).tobytes(), lipschitz(atoms)))
    assert len(seen) == 1
    assert gram(atoms).tobytes() == _sequential(atoms, atoms.T.copy()).tobytes()


@pytest.mark.parametrize("k, d", [(24, 10), (256, 64), (64, 256), (6, 6)])
def test_step_bound_is_an_upper_bound_on_the_top_eigenvalue(k, d):
    # Reference: LAPACK's symmetric eigensolver; the bound must not be below λ_max
    # (FISTA's step 1/L needs L >= λ_max) and is asked to be within 1e-6 of it.
    rng = np.random.default_rng(k + d)
    A = rng.standard_normal((k, d))
    if k == 6:
        A[3] = A[0]  # a repeated direction: a multiple top eigenvalue converges slowest
    top = float(np.linalg.eigvalsh(A @ A.T)[-1])
    bound = lipschitz(A)
    assert top * (1 - 1e-12) <= bound <= top * (1 + 1e-6)


@pytest.fixture(scope="module")
def encoder():
    rng = np.random.default_rng(1)
    W = _unit_atoms(np.random.default_rng(0), K, D)
    return fit_learned_encoder(rng.standard_normal((200, D)), W, "fista", 3, lam=0.3, n_steps=30)


def _opts(method, encoder):
    return {"encoder": encoder} if method == "learned" else OPTIONS[method]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("method", sorted(METHODS))
def test_every_row_alone_misaligned_or_shifted_gives_the_same_bytes(method, dtype, encoder):
    # The design's chunk rule: results depend on each row only. Pieces of 1 to 13 rows put
    # each row at every place of a 12-row GEMM tile (the tile whose rows 6-11 came out
    # different on OpenBLAS's Haswell kernels).
    rng = np.random.default_rng(2)
    W = _unit_atoms(np.random.default_rng(0), K, D)
    X = rng.standard_normal((37, D)).astype(dtype)
    opts = _opts(method, encoder)
    whole = code(X, W, method, **opts)
    variants = [code(_misaligned(X), W, method, **opts)]
    for size in (1, 5, 7, 13):
        parts = [code(X[a:a + size], W, method, **opts) for a in range(0, 37, size)]
        variants.append(parts)
    shifted = code(np.concatenate([X[:1] * 0.5, X]), W, method, **opts)
    for name in ("index", "value", "count"):
        ref = getattr(whole, name).tobytes()
        assert getattr(variants[0], name).tobytes() == ref, ("misaligned", name)
        for parts in variants[1:]:
            assert np.concatenate([getattr(p, name) for p in parts]).tobytes() == ref, name
        assert getattr(shifted, name)[1:].tobytes() == ref, ("shifted", name)
    assert whole.value.dtype == dtype
    assert whole.width == code_width(method, K, **opts)


def test_normalising_with_whitening_is_row_invariant():
    rng = np.random.default_rng(4)
    X = rng.standard_normal((300, 12)).astype(np.float32) @ rng.standard_normal((12, 12)).astype(np.float32)
    norm = Normaliser(whiten=True, whiten_eps=0.1).fit(X)
    whole = norm.apply(X)
    alone = np.concatenate([norm.apply(X[i:i + 1]) for i in range(40)])
    assert alone.tobytes() == whole[:40].tobytes()
    assert norm.apply(_misaligned(X[:40])).tobytes() == whole[:40].tobytes()


def row_digests() -> dict[str, str]:
    """Digest of every coder's codes (and of the product and step) for pinned inputs.

    The inputs come from numpy's Generator, whose streams numpy keeps stable across
    versions and platforms; the digests are in ``fixtures/row_digests.json``.
    """
    rng = np.random.default_rng(20261202)
    W = _unit_atoms(rng, K, D)
    out = {}
    for dtype in (np.float32, np.float64):
        X = rng.standard_normal((29, D)).astype(dtype)
        h = hashlib.sha256(product(X, W.T.astype(dtype)).tobytes())
        h.update(gram(W.astype(dtype)).tobytes())
        h.update(np.float64(lipschitz(W.astype(dtype))).tobytes())
        out[f"product-{np.dtype(dtype).name}"] = h.hexdigest()
        for method in sorted(OPTIONS):
            c = code(X, W, method, **OPTIONS[method])
            h = hashlib.sha256(c.index.tobytes() + c.value.tobytes() + c.count.tobytes())
            out[f"{method}-{np.dtype(dtype).name}"] = h.hexdigest()
    return out


def test_codes_match_the_pinned_digests_on_this_cpu_setting():
    # The promise across CPU kinds: given the same dictionary, the same codes, bit for bit.
    # fixtures/make_fixtures.py wrote the digests; CI checks them under every CPU setting.
    pinned = json.loads((FIXTURES / "row_digests.json").read_text())
    setting = os.environ.get("ATOMLINE_CPU_SETTING", "default")
    got = row_digests()
    assert {k: v for k, v in got.items() if v != pinned[k]} == {}, setting


if __name__ == "__main__":  # regenerate the pinned digests, on purpose only (say why in the commit)
    (FIXTURES / "row_digests.json").write_text(json.dumps(row_digests(), indent=1, sort_keys=True))
