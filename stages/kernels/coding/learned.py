"""A learned fast encoder: ISTA unrolled into a few trained layers (LISTA; Gregor &
LeCun, "Learning fast approximations of sparse coding", ICML 2010).

ISTA for the lasso is ``z ← h_θ(z (I − G/Lip) + c/Lip)`` with ``h_θ`` the soft threshold.
LISTA keeps that shape for a fixed number of layers and *learns* its matrices:

    b   = x · F                       F: filters (d, k), the one floor-sized product
    z₁  = h_θ(b)
    zₜ₊₁ = h_θ(b + zₜ · S)            S: inhibition (k, k), θ: thresholds (k,)

trained on a sample so that the last layer reproduces a chosen coder's codes (mean
squared error, Adam on full backpropagation through the layers, plain numpy). The
parameters start at ISTA's (``F = Wᵀ/Lip``, ``S = I − G/Lip``), so an untrained encoder
is ISTA stopped early. Encoding needs the product ``x·F`` and, per extra layer, a sum
over the current nonzeros of ``z`` (``nnz·k`` operations per row; compiled).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ...errors import InputError, problem
from ._common import (
    SparseCodes, check_problem, lipschitz, pack_row, positive_int, soft,
)
from .lars import lasso_width
from ._numba_cache import kernel
from ._rows import product

__all__ = ["LearnedEncoder", "fit_learned_encoder", "learned", "learned_width"]

#: Version tag of the stored form; ``from_stored`` refuses others.
STORED_FORMAT = "unrolled-ista-1"


@dataclass(frozen=True)
class LearnedEncoder:
    """Trained parameters of an unrolled-ISTA encoder for one dictionary.

    Attributes
    ----------
    filters : ndarray of shape (d, k), float64
    inhibition : ndarray of shape (k, k), float64
    thresholds : ndarray of shape (k,), float64, ``>= 0``
    n_layers : int
        Number of thresholding layers (``n_layers − 1`` inhibition products).
    positive : bool
        Use ``max(v − θ, 0)`` instead of the soft threshold (non-negative codes).
    info : dict
        Plain-JSON facts about the training (target coder and options, sample size,
        steps, final and initial relative error).
    """

    filters: np.ndarray
    inhibition: np.ndarray
    thresholds: np.ndarray
    n_layers: int
    positive: bool = False
    info: dict = field(default_factory=dict)

    @property
    def shape(self) -> tuple[int, int]:
        """``(k, d)``, the shape of the dictionary it was trained for."""
        d, k = self.filters.shape
        return k, d

    def arrays(self) -> dict[str, np.ndarray]:
        """The parameters as named arrays (to store beside the dictionary)."""
        return {"filters": self.filters, "inhibition": self.inhibition,
                "thresholds": self.thresholds}

    def attrs(self) -> dict:
        """Plain-JSON attributes that, with :meth:`arrays`, rebuild the encoder."""
        return {"format": STORED_FORMAT, "n_layers": int(self.n_layers),
                "positive": bool(self.positive), "info": _plain(self.info)}

    @classmethod
    def from_stored(cls, attrs: dict, arrays: dict[str, np.ndarray]) -> "LearnedEncoder":
        """Rebuild an encoder from :meth:`attrs` and :meth:`arrays`.

        Raises
        ------
        InputError
            Unknown format, missing arrays or inconsistent shapes.
        """
        if attrs.get("format") != STORED_FORMAT:
            raise InputError(problem("learned encoder attrs", f"format {STORED_FORMAT!r}",
                                     repr(attrs.get("format")), "Retrain the encoder."))
        try:
            F = np.asarray(arrays["filters"], dtype=np.float64)
            S = np.asarray(arrays["inhibition"], dtype=np.float64)
            th = np.asarray(arrays["thresholds"], dtype=np.float64)
        except KeyError as exc:
            raise InputError(problem("learned encoder arrays", "filters, inhibition, thresholds",
                                     f"missing {exc}", "Store all of arrays().")) from exc
        d, k = F.shape if F.ndim == 2 else (0, 0)
        if F.ndim != 2 or S.shape != (k, k) or th.shape != (k,):
            raise InputError(problem("learned encoder arrays", "filters (d, k), inhibition (k, k), "
                                     "thresholds (k,)", f"{F.shape}, {S.shape}, {th.shape}",
                                     "Store the arrays of one encoder."))
        return cls(F, S, th, positive_int("n_layers", attrs.get("n_layers")),
                   bool(attrs.get("positive", False)), dict(attrs.get("info", {})))


def learned(X: np.ndarray, atoms: np.ndarray, *, encoder: LearnedEncoder,
            max_nonzero: int | None = None) -> SparseCodes:
    """Code every row with a trained unrolled-ISTA encoder.

    Parameters
    ----------
    X : ndarray of shape (n_rows, d), float32 or float64
    atoms : ndarray of shape (k, d)
        The dictionary the encoder was trained for (its shape is checked).
    encoder : LearnedEncoder
        From :func:`fit_learned_encoder` or :meth:`LearnedEncoder.from_stored`.
    max_nonzero : int, optional
        Keep at most this many nonzeros per row (largest magnitudes); default ``k``.

    Returns
    -------
    SparseCodes
        Width ``max_nonzero`` or ``k``; slots in increasing atom order.
    """
    if not isinstance(encoder, LearnedEncoder) or encoder.shape != atoms.shape:
        found = encoder.shape if isinstance(encoder, LearnedEncoder) else type(encoder).__name__
        raise InputError(problem("option encoder", f"a LearnedEncoder for atoms {atoms.shape}",
                                 str(found), "Train one with fit_learned_encoder for this "
                                 "dictionary."))
    k = atoms.shape[0]
    width = lasso_width(k, max_nonzero=max_nonzero)
    dt = X.dtype
    B = product(X, encoder.filters)  # (n, k): the floor-sized product
    n = X.shape[0]
    index = np.empty((n, width), dtype=np.int32)
    value = np.empty((n, width), dtype=dt)
    count = np.empty(n, dtype=np.int32)
    _unrolled_rows(B, encoder.inhibition.astype(dt), encoder.thresholds.astype(dt),
                   int(encoder.n_layers), bool(encoder.positive), index, value, count)
    return SparseCodes(index, value, count, k)


def learned_width(n_atoms: int, *, max_nonzero: int | None = None, **_: object) -> int:
    """Slots per row of :func:`learned`: ``max_nonzero`` or ``k``."""
    return lasso_width(n_atoms, max_nonzero=max_nonzero)


def fit_learned_encoder(
    X_sample: np.ndarray,
    atoms: np.ndarray,
    target_method: str,
    n_layers: int = 3,
    *,
    n_steps: int = 1500,
    batch_size: int = 256,
    learning_rate: float = 1e-3,
    seed: int = 0,
    **target_options: Any,
) -> LearnedEncoder:
    """Train an unrolled-ISTA encoder to reproduce a coder's codes on a sample.

    Parameters
    ----------
    X_sample : ndarray of shape (n_rows, d), float32 or float64
        Training rows, preprocessed like the rows to encode.
    atoms : ndarray of shape (k, d)
        The dictionary.
    target_method : str
        The coder to imitate (a key of ``METHODS``, e.g. ``"fista"`` or ``"omp"``).
    n_layers : int
        Thresholding layers of the encoder.
    n_steps, batch_size, learning_rate, seed
        Adam steps, rows per step, step size and the seed of the batch order.
    **target_options
        Options of the target coder (e.g. ``lam``); ``positive`` also makes the
        encoder non-negative.

    Returns
    -------
    LearnedEncoder
        ``info`` records the target, the sample size and the relative squared error
        ``‖Z − Z*‖² / ‖Z*‖²`` on the sample before and after training.
    """
    from . import code  # the public entry point validates the target and its options

    X, W = check_problem(X_sample, atoms)
    X = X.astype(np.float64)
    W = W.astype(np.float64)
    n_layers = positive_int("n_layers", n_layers)
    n_steps = positive_int("n_steps", n_steps, allow_zero=True)
    batch_size = positive_int("batch_size", batch_size)
    target = code(X, W, target_method, **target_options).dense()
    positive = bool(target_options.get("positive", False))
    k = W.shape[0]
    Lip = lipschitz(W)
    C = X @ W.T
    # Start at ISTA; the threshold starts where a first layer keeps as many
    # nonzeros per row as the target has on average.
    keep = float(np.count_nonzero(target)) / X.shape[0]
    q = float(np.clip(1.0 - keep / k, 0.0, 1.0))
    lam0 = float(target_options.get("lam", np.quantile(np.abs(C), q)))
    params = {"F": W.T / Lip, "S": np.eye(k) - (W @ W.T) / Lip,
              "theta": np.full(k, lam0 / Lip)}
    rng = np.random.default_rng(seed)
    adam = {name: (np.zeros_like(p), np.zeros_like(p)) for name, p in params.items()}
    norm = max(float(np.sum(target ** 2)), np.finfo(np.float64).tiny)
    before = _relative_error(X, target, params, n_layers, positive, norm)
    b1, b2, eps = 0.9, 0.999, 1e-8
    n = X.shape[0]
    for step in range(1, n_steps + 1):
        rows = rng.choice(n, size=min(batch_size, n), replace=False)
        grads = _gradients(X[rows], target[rows], params, n_layers, positive)
        for name, g in grads.items():
            m, v = adam[name]
            m *= b1
            m += (1 - b1) * g
            v *= b2
            v += (1 - b2) * g * g
            mhat = m / (1 - b1 ** step)
            vhat = v / (1 - b2 ** step)
            params[name] -= learning_rate * mhat / (np.sqrt(vhat) + eps)
        np.maximum(params["theta"], 0.0, out=params["theta"])
    after = _relative_error(X, target, params, n_layers, positive, norm)
    info = {"target_method": target_method, "target_options": _plain(target_options),
            "sample_rows": int(n), "steps": int(n_steps), "batch_size": int(batch_size),
            "learning_rate": float(learning_rate), "seed": int(seed),
            "relative_error_initial": float(before), "relative_error_final": float(after)}
    return LearnedEncoder(params["F"], params["S"], params["theta"], n_layers, positive, info)


def _shrink(V: np.ndarray, theta: np.ndarray, positive: bool) -> np.ndarray:
    """Soft threshold (or its non-negative form) of (n, k) pre-activations."""
    if positive:
        return np.maximum(V - theta, 0.0)
    return np.sign(V) * np.maximum(np.abs(V) - theta, 0.0)


def _forward(X, params, n_layers, positive):
    """Layer pre-activations and outputs, dense; lists of (n, k) arrays."""
    B = X @ params["F"]
    Vs, Zs = [B], [_shrink(B, params["theta"], positive)]
    for _ in range(1, n_layers):
        V = B + Zs[-1] @ params["S"]
        Vs.append(V)
        Zs.append(_shrink(V, params["theta"], positive))
    return B, Vs, Zs


def _relative_error(X, target, params, n_layers, positive, norm) -> float:
    Z = _forward(X, params, n_layers, positive)[2][-1]
    return float(np.sum((Z - target) ** 2) / norm)


def _gradients(X, target, params, n_layers, positive) -> dict[str, np.ndarray]:
    """Backpropagation of ``mean_rows ½‖z_T − z*‖²`` through the unrolled layers."""
    n = X.shape[0]
    B, Vs, Zs = _forward(X, params, n_layers, positive)
    theta = params["theta"]
    dZ = (Zs[-1] - target) / n
    dB = np.zeros_like(B)
    dS = np.zeros_like(params["S"])
    dtheta = np.zeros_like(theta)
    for t in range(n_layers - 1, -1, -1):
        V = Vs[t]
        if positive:
            mask = V > theta
            dtheta -= np.sum(dZ * mask, axis=0)
        else:
            mask = np.abs(V) > theta
            dtheta -= np.sum(dZ * mask * np.sign(V), axis=0)
        dV = dZ * mask
        dB += dV
        if t > 0:
            dS += Zs[t - 1].T @ dV
            dZ = dV @ params["S"].T
    return {"F": X.T @ dB, "S": dS, "theta": dtheta}


def _plain(obj: Any) -> Any:
    """Turn numpy scalars and containers into plain JSON types (others: ``repr``)."""
    if isinstance(obj, dict):
        return {str(key): _plain(val) for key, val in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(val) for val in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj)
    if obj is None or isinstance(obj, str):
        return obj
    return repr(obj)


@kernel
def _unrolled_rows(B, S, theta, n_layers, positive, index, value, count):  # pragma: no cover
    n, k = B.shape
    z = np.empty(k, dtype=B.dtype)
    v = np.empty(k, dtype=B.dtype)
    for i in range(n):
        for j in range(k):
            z[j] = max(B[i, j] - theta[j], 0.0) if positive else soft(B[i, j], theta[j])
        for _ in range(1, n_layers):
            for j in range(k):
                v[j] = B[i, j]
            for j in range(k):
                zj = z[j]
                if zj != 0:  # z is sparse: sum over its nonzeros only
                    for jj in range(k):
                        v[jj] += zj * S[j, jj]
            for j in range(k):
                z[j] = max(v[j] - theta[j], 0.0) if positive else soft(v[j], theta[j])
        pack_row(z, i, index, value, count)
