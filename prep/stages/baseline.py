"""Baseline-wander stage: two-stage median filter (default) or an extra zero-phase high-pass."""
from __future__ import annotations

import numpy as np
from scipy import ndimage, signal

from prep.config import BaselineConfig
from prep.model import StageLog
from prep.stages._checks import as_signal
from prep.stages._design import butter_sos, warped_corner


def _odd(n: float) -> int:
    n = max(1, int(round(n)))
    return n if n % 2 else n + 1


def decimation_step(fs: float, rate_hz: float) -> int:
    """Every how many samples the medians look at when they run at ``rate_hz`` (1: all).

    >>> decimation_step(360.0, 100.0), decimation_step(500.0, 100.0), decimation_step(360.0, 0.0)
    (3, 5, 1)
    """
    if rate_hz <= 0 or rate_hz * 2 > fs:
        return 1
    return int(fs // rate_hz)


def median_windows(fs: float, first_ms: float, second_ms: float,
                   rate_hz: float) -> tuple[int, int, int]:
    """(decimation step, first window, second window), the windows in samples taken (odd)."""
    d = decimation_step(fs, rate_hz)
    return d, _odd(first_ms * fs / d / 1000), _odd(second_ms * fs / d / 1000)


def median_baseline(x: np.ndarray, fs: float, first_ms: float, second_ms: float,
                    rate_hz: float = 0.0, start: int = 0) -> np.ndarray:
    """Baseline estimate by a median of ``first_ms`` then of ``second_ms`` (de Chazal et al. 2004).

    With ``rate_hz`` > 0 both medians run on every ``d = decimation_step(fs, rate_hz)``-th
    sample, with no smoothing first (a median of a subset of a window's samples estimates the
    same median, and a jump of the baseline stays a jump), and the baseline is interpolated back
    linearly in between, held constant beyond the first and last sample taken. The samples taken
    are those whose sample number counted from the source's first sample is a multiple of ``d``
    (``start`` is the sample number of ``x[..., 0]``), so a stretch read on its own (a chunk)
    gets the samples of the whole record.

    >>> fs = 360.0; t = np.arange(3600) / fs
    >>> drift = 0.5 * np.sin(2 * np.pi * 0.2 * t)
    >>> bool(np.abs(median_baseline(drift, fs, 200, 600) - drift).max() < 0.01)
    True
    >>> bool(np.abs(median_baseline(drift, fs, 200, 600, rate_hz=100) - drift).max() < 0.01)
    True
    """
    d, w1, w2 = median_windows(fs, first_ms, second_ms, rate_hz)
    flat = x.reshape(-1, x.shape[-1])
    n = flat.shape[-1]
    at = np.arange((-int(start)) % d, n, d) if d > 1 else None
    if at is not None and at.size == 0:  # shorter than one step: its first sample
        at = np.array([0])
    taken = flat if at is None else flat[:, at]
    base = np.empty_like(taken)
    for i, row in enumerate(taken):  # 1-D filters: ndimage is ~20x slower on a (1, w) footprint
        b = ndimage.median_filter(row, size=w1, mode="nearest")
        base[i] = ndimage.median_filter(b, size=w2, mode="nearest")
    if at is None:
        return base.reshape(x.shape)
    # linear interpolation in between, held constant before the first and after the last
    t = np.arange(n, dtype=float)
    out = np.empty_like(flat)
    for i, row in enumerate(base):
        out[i] = np.interp(t, at, row)
    return out.reshape(x.shape)


def remove_baseline(x, fs: float, cfg: BaselineConfig = BaselineConfig(), start: int = 0):
    """Remove baseline wander from ``x`` (..., n_samples). Returns (y, StageLog).

    ``start``: sample number of ``x[..., 0]`` in its source record (a chunk's first sample),
    which places the samples the decimated medians take (see :func:`median_baseline`)."""
    x = as_signal(x, fs, "remove_baseline", min_samples=2)
    log = StageLog("baseline", params={"method": cfg.method})
    if cfg.method == "none":
        return x.copy(), log
    if cfg.method == "median":
        d, w1, w2 = median_windows(fs, cfg.first_window_ms, cfg.second_window_ms,
                                   cfg.median_rate_hz)
        log.params.update(first_window_ms=cfg.first_window_ms, second_window_ms=cfg.second_window_ms,
                          median_rate_hz=cfg.median_rate_hz)
        log.derived.update(decimation_step=d, median_rate_hz=round(fs / d, 6),
                           first_window_samples=w1, second_window_samples=w2,
                           first_window_ms_used=round(1000 * w1 * d / fs, 3),
                           second_window_ms_used=round(1000 * w2 * d / fs, 3))
        return x - median_baseline(x, fs, cfg.first_window_ms, cfg.second_window_ms,
                                   cfg.median_rate_hz, start), log
    corner = warped_corner(cfg.highpass_hz, fs, 2, up=True)
    sos = butter_sos(2, corner, "highpass", fs)
    padlen = min(x.shape[-1] - 1, int(round(3 * fs / cfg.highpass_hz)))
    log.params["highpass_hz"] = cfg.highpass_hz
    log.derived["design"] = {"type": "Butterworth high-pass, order 2, zero-phase",
                             "single_pass_corner_hz": round(corner, 6), "padlen_samples": padlen}
    return signal.sosfiltfilt(sos, x, axis=-1, padlen=padlen), log
