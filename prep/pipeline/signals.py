"""Signal helpers of the orchestrator: gaps filled before stages run, and the second detector
(neurokit2's gradient-threshold method, our own code) the quality indices compare ours with."""
from __future__ import annotations

import numpy as np


def fill_gaps(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Replace NaN/inf runs by linear interpolation per lead; returns (filled, gap mask)."""
    gap = ~np.isfinite(x)
    if not gap.any():
        return x, gap
    y = x.copy()
    idx = np.arange(x.shape[1])
    for j in np.flatnonzero(gap.any(axis=1)):
        ok = ~gap[j]
        y[j] = np.interp(idx, idx[ok], x[j, ok]) if ok.any() else 0.0
    return y, gap


#: how the manifest names the second detector
SECOND_DETECTOR = "gradient_peaks (the method of neurokit2.ecg_findpeaks(method='neurokit'))"


def second_detector(x: np.ndarray, fs: float) -> np.ndarray:
    """R peaks of a second, independent detector on the filtered lead (for bSQI and agreement):
    :func:`gradient_peaks`, the gradient-threshold method of neurokit2's ``ecg_findpeaks``
    (``method="neurokit"``), run without importing neurokit2 (about 1 s per process)."""
    # the lead is already band-limited to 40 Hz, so keeping every q-th sample down to >= 90 Hz
    # does not alias it; the peer detector then runs q times faster (R within +-q samples)
    q = max(1, int(fs // 90))
    return gradient_peaks(x[::q], int(round(fs / q))) * q


def gradient_peaks(x: np.ndarray, fs: int, smooth_s: float = 0.1, average_s: float = 0.75,
                   weight: float = 1.5, min_len_weight: float = 0.4,
                   min_delay_s: float = 0.3) -> np.ndarray:
    """Sorted R-peak indices of the gradient-threshold detector of Makowski et al. 2021
    (neurokit2, ``ecg_findpeaks(method="neurokit")``; defaults are that method's).

    QRS stretches are where the absolute gradient, smoothed over ``smooth_s`` (boxcar), exceeds
    ``weight`` times its own boxcar average over ``average_s``; stretches shorter than
    ``min_len_weight`` times the mean stretch are skipped; in each, the local maximum of the
    signal with the largest prominence is the R peak, kept when it lies more than
    ``min_delay_s`` after the previous one (the first must lie that far after sample 0, as in
    the original). Tests check the peaks are identical to neurokit2's on records and
    simulations (tests/pipeline/test_signals.py). An input too short for the averaging window
    gives no peak (the original raises).
    """
    from scipy import ndimage, signal

    x = np.asarray(x, dtype=np.float64)
    k_smooth, k_avg = int(np.rint(smooth_s * fs)), int(np.rint(average_s * fs))
    empty = np.zeros(0, np.int64)
    if not (1 <= k_smooth <= x.size and 1 <= k_avg <= x.size):
        return empty
    smooth = ndimage.uniform_filter1d(np.abs(np.gradient(x)), k_smooth, mode="nearest")
    qrs = smooth > weight * ndimage.uniform_filter1d(smooth, k_avg, mode="nearest")
    starts = np.flatnonzero(~qrs[:-1] & qrs[1:])
    if starts.size == 0:
        return empty
    ends = np.flatnonzero(qrs[:-1] & ~qrs[1:])
    ends = ends[ends > starts[0]]
    n = min(starts.size, ends.size)
    if n == 0:
        return empty
    starts, ends = starts[:n], ends[:n]
    keep = (ends - starts) >= np.mean(ends - starts) * min_len_weight
    min_delay = int(np.rint(fs * min_delay_s))
    peaks, last = [], 0
    for b, e in zip(starts[keep].tolist(), ends[keep].tolist()):
        top, props = signal.find_peaks(x[b:e], prominence=(None, None))
        if top.size:
            peak = b + int(top[np.argmax(props["prominences"])])
            if peak - last > min_delay:
                peaks.append(peak)
                last = peak
    return np.asarray(peaks, dtype=np.int64)
