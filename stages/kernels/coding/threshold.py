"""Soft-threshold encoder: one product, then ``sign(c)·max(|c| − alpha, 0)``, ``c = W x``.

The cheapest useful coder (Coates & Ng, ICML 2011, pair it with dictionaries trained
for it). With ``split_sign=True`` each atom gives two outputs, ``max(0, c − alpha)`` and
``max(0, −c − alpha)``: the codes then refer to ``2k`` outputs (``n_atoms = 2k``;
output ``j < k`` is atom ``j``'s positive part, output ``k + j`` its negative part), and
``.dense()`` is ``[positive parts | negative parts]`` of shape (n_rows, 2k). Since
``alpha ≥ 0``, at most one of the two parts of an atom is nonzero, so the width stays
``k``. Thresholding and packing run in one compiled pass over the product.
"""

from __future__ import annotations

import numpy as np

from ._common import SparseCodes, nonnegative_float
from ._rows import product_blocks
from ._numba_cache import kernel

__all__ = ["threshold", "threshold_width"]


def threshold(
    X: np.ndarray,
    atoms: np.ndarray,
    *,
    alpha: float = 0.0,
    split_sign: bool = False,
) -> SparseCodes:
    """Code every row by soft thresholding its correlations with the atoms.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d), same dtype (unit-norm atoms expected)
    alpha : float
        Threshold offset (``>= 0``).
    split_sign : bool
        Give positive and negative parts as separate outputs (``n_atoms = 2k``).

    Returns
    -------
    SparseCodes
        Width ``k``; slots in increasing output order.
    """
    alpha = nonnegative_float("alpha", alpha)
    k = atoms.shape[0]
    n = X.shape[0]
    index = np.empty((n, k), dtype=np.int32)
    value = np.empty((n, k), dtype=X.dtype)
    count = np.empty(n, dtype=np.int32)
    for a, b, C in product_blocks(X, atoms.T):  # each block thresholded while cached
        _threshold_rows(C, X.dtype.type(alpha), bool(split_sign), index[a:b], value[a:b],
                        count[a:b])
    return SparseCodes(index, value, count, 2 * k if split_sign else k)


def threshold_width(n_atoms: int, *, alpha: float = 0.0, split_sign: bool = False,
                    **_: object) -> int:
    """Slots per row of :func:`threshold`: ``k`` (also with ``split_sign``)."""
    return n_atoms


@kernel
def _threshold_rows(C, alpha, split_sign, index, value, count):  # pragma: no cover
    n, k = C.shape
    for i in range(n):
        # Branch-free compaction: always write the slot, advance only on a nonzero.
        s = 0
        if split_sign:
            for j in range(k):  # positive parts: outputs 0 .. k-1
                v = max(C[i, j] - alpha, 0.0)
                index[i, s] = j
                value[i, s] = v
                s += v > 0
            for j in range(k):  # negative parts: outputs k .. 2k-1
                v = max(-C[i, j] - alpha, 0.0)
                if s < k:  # s == k only once every slot holds a nonzero
                    index[i, s] = k + j
                    value[i, s] = v
                s += v > 0
        else:
            for j in range(k):
                c = C[i, j]
                v = max(c - alpha, 0.0) + min(c + alpha, 0.0)
                index[i, s] = j
                value[i, s] = v
                s += v != 0
        count[i] = s
        for t in range(s, k):
            index[i, t] = -1
            value[i, t] = 0
