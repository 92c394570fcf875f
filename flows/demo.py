"""The demo scenario: vibration records from rotating machines (synthetic, seeded).

Every record is a 2048-sample window of an accelerometer signal sampled at 20.48 kHz
(0.1 s). All records carry sensor noise and a shaft tone at a random phase; each condition
class adds its own signature at random time offsets and phases:

=====================  ================================================================
class                  signature
=====================  ================================================================
0 ``steady``           nothing beyond noise and the shaft tone
1 ``race-impacts``     a train of impacts every ~9.3 ms, each ringing a 3.2 kHz resonance
2 ``mesh-tone``        a steady 1.6 kHz tone
3 ``rub-bursts``       three short Hann-windowed 5.5 kHz bursts at random times
=====================  ================================================================

Because offsets and phases are random, every class has zero mean waveform, so a linear
classifier on the raw samples is near chance; pooled sparse codes see *which* waveforms
occur, wherever they occur, and separate the classes.

The data are invented for the demonstration. Nothing here models a real machine, and no
output of atomline is a maintenance or safety decision: it is a screening aid for data
work, and decisions about machinery belong to qualified people following their own
practice.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import fftconvolve

__all__ = ["CLASS_NAMES", "vibration_records", "SAMPLE_RATE", "RECORD_LENGTH"]

SAMPLE_RATE = 20_480.0
RECORD_LENGTH = 2048
CLASS_NAMES = ("steady", "race-impacts", "mesh-tone", "rub-bursts")


def vibration_records(
    n_records: int, *, length: int = RECORD_LENGTH, seed: int = 0
) -> tuple[np.ndarray, np.ndarray]:
    """Generate labelled synthetic vibration windows.

    Parameters
    ----------
    n_records : int
        Number of records; classes are balanced (round robin, then shuffled).
    length : int
        Samples per record.
    seed : int

    Returns
    -------
    records : ndarray of shape (n_records, length), float32
    labels : ndarray of shape (n_records,), int64
        Class numbers, names in :data:`CLASS_NAMES`.
    """
    rng = np.random.default_rng(seed)
    labels = rng.permutation(np.arange(n_records) % len(CLASS_NAMES))
    t = np.arange(length) / SAMPLE_RATE
    x = rng.standard_normal((n_records, length))  # sensor noise, unit variance
    shaft = 0.6 * np.sin(2 * np.pi * 29.5 * t[None, :] + rng.uniform(0, 2 * np.pi, (n_records, 1)))
    x += shaft
    for cls, make in ((1, _impacts), (2, _tone), (3, _bursts)):
        rows = np.flatnonzero(labels == cls)
        if rows.size:
            x[rows] += make(rows.size, length, t, rng)
    return x.astype(np.float32), labels.astype(np.int64)


def _impacts(n: int, length: int, t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    period = int(SAMPLE_RATE / 110.0)  # ~186 samples between impacts
    spikes = np.zeros((n, length))
    first = rng.integers(0, period, n)
    for m in range(length // period + 1):  # loop over impacts in a window, not over rows
        pos = first + m * period
        ok = pos < length
        spikes[np.flatnonzero(ok), pos[ok]] = rng.uniform(1.5, 2.5, ok.sum())
    tk = np.arange(64) / SAMPLE_RATE
    ring = np.exp(-tk / 1.2e-3) * np.sin(2 * np.pi * 3200.0 * tk)
    return fftconvolve(spikes, ring[None, :], axes=1)[:, :length] * 1.6


def _tone(n: int, length: int, t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    phase = rng.uniform(0, 2 * np.pi, (n, 1))
    amp = rng.uniform(0.7, 1.0, (n, 1))
    return amp * np.sin(2 * np.pi * 1600.0 * t[None, :] + phase)


def _bursts(n: int, length: int, t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    width = 48
    tk = np.arange(width) / SAMPLE_RATE
    window = np.hanning(width)
    kc = window * np.cos(2 * np.pi * 5500.0 * tk)
    ks = window * np.sin(2 * np.pi * 5500.0 * tk)
    spikes_c = np.zeros((n, length))
    spikes_s = np.zeros((n, length))
    for _ in range(3):  # three bursts per record
        pos = rng.integers(0, length - width, n)
        phase = rng.uniform(0, 2 * np.pi, n)
        amp = rng.uniform(2.0, 3.0, n)
        spikes_c[np.arange(n), pos] += amp * np.cos(phase)
        spikes_s[np.arange(n), pos] += amp * np.sin(phase)
    out = fftconvolve(spikes_c, kc[None, :], axes=1) + fftconvolve(spikes_s, ks[None, :], axes=1)
    return out[:, :length]
