"""Filter-design helpers shared by the filter stages."""
from __future__ import annotations

from functools import lru_cache

import numpy as np


def butter_sos(order: int, freqs, btype: str, fs: float) -> np.ndarray:
    """``scipy.signal.butter(..., output="sos")``, designed once per (order, corners, type,
    rate) in a process: a batch of records at one rate and many leads designs each filter once
    (a copy of the cached design is returned).

    >>> butter_sos(2, 0.5, "highpass", 250.0).shape
    (1, 6)
    """
    key = tuple(float(f) for f in np.atleast_1d(freqs))
    return _butter(int(order), key, btype, float(fs)).copy()


@lru_cache(maxsize=256)
def _butter(order: int, freqs: tuple, btype: str, fs: float) -> np.ndarray:
    from scipy import signal
    sos = signal.butter(order, freqs[0] if len(freqs) == 1 else list(freqs), btype, fs=fs,
                        output="sos")
    return sos


def corner_shift(order: int) -> float:
    # single pass loses 1.5 dB at f: 1 + (fc/f)^(2N) = 10^0.15  ->  fc = f * (10^0.15 - 1)^(1/2N)
    return (10 ** 0.15 - 1) ** (1 / (2 * order))


def warped_corner(f: float, fs: float, order: int, *, up: bool) -> float:
    # the digital Butterworth response depends on tan(pi f / fs) (bilinear transform), so the
    # corner shift is applied in that warped axis; up=True for the high-pass corner.
    k = corner_shift(order)
    w = np.tan(np.pi * f / fs)
    return float(np.arctan(w * k if up else w / k) * fs / np.pi)
