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
    return second_detector_leads(np.asarray(x)[None, :], fs)[0]


def second_detector_leads(x: np.ndarray, fs: float) -> list[np.ndarray]:
    """:func:`second_detector` on every row of ``x`` (n_leads, n) at once, one array per row."""
    # the lead is already band-limited to 40 Hz, so keeping every q-th sample down to >= 90 Hz
    # does not alias it; the peer detector then runs q times faster (R within +-q samples)
    q = max(1, int(fs // 90))
    return [p * q for p in gradient_rows(x[:, ::q], int(round(fs / q)))]


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
    return gradient_rows(np.asarray(x)[None, :], fs, smooth_s, average_s, weight,
                         min_len_weight, min_delay_s)[0]


def gradient_rows(x: np.ndarray, fs: int, smooth_s: float = 0.1, average_s: float = 0.75,
                  weight: float = 1.5, min_len_weight: float = 0.4,
                  min_delay_s: float = 0.3) -> list[np.ndarray]:
    """:func:`gradient_peaks` on every row of ``x`` (n_rows, n): the filters run along the rows
    of one array, and the peaks of all rows' QRS stretches are found in one call (the rows laid
    end to end, no stretch crossing a row's end)."""
    from scipy import ndimage

    x = np.asarray(x, dtype=np.float64)
    rows, n = x.shape
    k_smooth, k_avg = int(np.rint(smooth_s * fs)), int(np.rint(average_s * fs))
    out = [np.zeros(0, np.int64) for _ in range(rows)]
    if not (1 <= k_smooth <= n and 1 <= k_avg <= n):
        return out
    smooth = ndimage.uniform_filter1d(np.abs(np.gradient(x, axis=-1)), k_smooth, axis=-1,
                                      mode="nearest")
    qrs = smooth > weight * ndimage.uniform_filter1d(smooth, k_avg, axis=-1, mode="nearest")
    rise, fall = ~qrs[:, :-1] & qrs[:, 1:], qrs[:, :-1] & ~qrs[:, 1:]
    first, last, owner = [], [], []
    for j in range(rows):
        starts = np.flatnonzero(rise[j])
        if starts.size == 0:
            continue
        ends = np.flatnonzero(fall[j])
        ends = ends[ends > starts[0]]
        m = min(starts.size, ends.size)
        if m == 0:
            continue
        starts, ends = starts[:m], ends[:m]
        keep = (ends - starts) >= np.mean(ends - starts) * min_len_weight
        first.append(starts[keep] + j * n)
        last.append(ends[keep] + j * n)
        owner.append(np.full(int(keep.sum()), j))
    if not first:
        return out
    owner = np.concatenate(owner)
    found = _most_prominent(x.ravel(), np.concatenate(first), np.concatenate(last))
    min_delay = int(np.rint(fs * min_delay_s))
    for j in np.unique(owner).tolist():
        peaks, prev = [], 0
        for peak in found[owner == j].tolist():
            if peak >= 0:
                peak -= j * n
                if peak - prev > min_delay:
                    peaks.append(peak)
                    prev = peak
        out[j] = np.asarray(peaks, dtype=np.int64)
    return out


def _most_prominent(x: np.ndarray, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """For each stretch ``x[b:e]``, the index (in ``x``) of its local maximum of largest
    prominence, the first of equals; -1 where the stretch has no local maximum. The same as
    ``scipy.signal.find_peaks(x[b:e], prominence=(None, None))`` per stretch, for all stretches
    at once: stretches padded into one array, every local maximum's prominence from the lowest
    sample on each side before a higher one or the stretch's edge. A stretch holding two equal
    neighbouring samples (a possible flat peak) goes to find_peaks itself."""
    out = np.full(starts.size, -1, np.int64)
    if starts.size == 0:
        return out
    lengths = ends - starts
    width = int(lengths.max())
    col = np.arange(width)
    inside = col[None, :] < lengths[:, None]
    seg = np.where(inside, x[np.minimum(starts[:, None] + col[None, :], x.size - 1)], np.nan)
    flat = (seg[:, 1:] == seg[:, :-1]).any(axis=1)
    # a strict local maximum with both neighbours inside the stretch
    top = np.zeros(seg.shape, bool)
    top[:, 1:-1] = (seg[:, 1:-1] > seg[:, :-2]) & (seg[:, 1:-1] > seg[:, 2:])
    top[flat] = False
    row, at = np.nonzero(top)
    if row.size:
        s = seg[row]                                    # one row per candidate peak
        h = s[np.arange(row.size), at][:, None]
        higher = s > h                                  # NaN padding compares False
        left = np.where(higher & (col[None, :] < at[:, None]), col[None, :], -1).max(axis=1)
        right = np.where(higher & (col[None, :] > at[:, None]), col[None, :],
                         lengths[row][:, None]).min(axis=1)
        span_l = (col[None, :] > left[:, None]) & (col[None, :] <= at[:, None])
        span_r = (col[None, :] >= at[:, None]) & (col[None, :] < right[:, None])
        low_l = np.where(span_l, s, np.inf).min(axis=1)
        low_r = np.where(span_r, s, np.inf).min(axis=1)
        prom = h[:, 0] - np.maximum(low_l, low_r)
        # first candidate of the largest prominence in each stretch (candidates are in order)
        order = np.lexsort((at, -prom, row))
        first = np.r_[True, row[order][1:] != row[order][:-1]]
        best = order[first]
        out[row[best]] = starts[row[best]] + at[best]
    from scipy import signal
    for i in np.flatnonzero(flat):
        b, e = int(starts[i]), int(ends[i])
        t, props = signal.find_peaks(x[b:e], prominence=(None, None))
        if t.size:
            out[i] = b + int(t[np.argmax(props["prominences"])])
    return out
