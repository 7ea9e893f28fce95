"""Filter-design helpers shared by the filter stages."""
from __future__ import annotations

import numpy as np


def corner_shift(order: int) -> float:
    # single pass loses 1.5 dB at f: 1 + (fc/f)^(2N) = 10^0.15  ->  fc = f * (10^0.15 - 1)^(1/2N)
    return (10 ** 0.15 - 1) ** (1 / (2 * order))


def warped_corner(f: float, fs: float, order: int, *, up: bool) -> float:
    # the digital Butterworth response depends on tan(pi f / fs) (bilinear transform), so the
    # corner shift is applied in that warped axis; up=True for the high-pass corner.
    k = corner_shift(order)
    w = np.tan(np.pi * f / fs)
    return float(np.arctan(w * k if up else w / k) * fs / np.pi)
