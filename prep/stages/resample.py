"""Resampling stage: cut every beat window and bring it to a fixed number of samples, anti-aliased."""
from __future__ import annotations

from fractions import Fraction

import numpy as np
from scipy import signal

from prep.model import StageLog
from prep.stages._design import butter_sos


def cut_and_resample(x: np.ndarray, start: np.ndarray, end: np.ndarray, n_out: int, fs: float):
    """Beats of ``x`` (n_leads, n_samples) between ``start`` and ``end`` as (n_beats, n_leads, n_out).

    Windows of one common length (mode 'fixed') go through ``scipy.signal.resample_poly`` at once,
    whose FIR low-pass prevents aliasing. Windows of varying length (mode 'rr') are low-passed on the
    whole lead at the strictest output Nyquist, then linearly interpolated, all beats at once.
    Windows must lie inside the signal.

    >>> x = np.sin(np.linspace(0, 20, 1000))[None]
    >>> b, _ = cut_and_resample(x, np.array([100, 400]), np.array([300, 600]), 50, 100.0)
    >>> b.shape
    (2, 1, 50)
    """
    n_leads = x.shape[0]
    log = StageLog("resample", params={"n_samples": n_out})
    if start.size == 0:
        return np.zeros((0, n_leads, n_out)), log
    lengths = end - start
    if np.all(lengths == lengths[0]):
        L = int(lengths[0])
        idx = start[:, None] + np.arange(L)
        seg = x[:, idx].transpose(1, 0, 2)  # (n_beats, n_leads, L)
        ratio = Fraction(n_out, L).limit_denominator(1000)
        up, down = ratio.numerator, ratio.denominator
        y = signal.resample_poly(seg, up, down, axis=-1, padtype="line")
        if y.shape[-1] != n_out:  # limit_denominator rounding: trim or edge-pad a sample or two
            y = y[..., :n_out] if y.shape[-1] > n_out else np.pad(
                y, [(0, 0), (0, 0), (0, n_out - y.shape[-1])], mode="edge")
        log.derived.update(method="resample_poly", window_samples=L, up=up, down=down,
                           output_rate_hz=round(fs * n_out / L, 6))
        return y, log
    longest = int(lengths.max())
    cutoff = 0.45 * fs * n_out / longest
    if cutoff < 0.45 * fs:
        sos = butter_sos(6, cutoff, "lowpass", fs)
        x = signal.sosfiltfilt(sos, x, axis=-1)
    pos = start[:, None] + (lengths[:, None] - 1) * np.linspace(0.0, 1.0, n_out)[None, :]
    i0 = np.floor(pos).astype(np.int64)
    i1 = np.minimum(i0 + 1, x.shape[-1] - 1)
    frac = pos - i0
    y = x[:, i0] * (1 - frac) + x[:, i1] * frac  # (n_leads, n_beats, n_out)
    log.derived.update(method="lowpass+linear", lowpass_hz=round(min(cutoff, 0.45 * fs), 4),
                       longest_window_samples=longest)
    return y.transpose(1, 0, 2), log
