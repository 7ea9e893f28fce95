"""Window quality stage: grade every lead in fixed windows with signal-quality indices.

For each lead and window (default 10 s) the stage computes direct fault shares, published noise
indices and rhythm plausibility, and grades the window ``good``, ``noisy`` or ``unusable``, naming
the indices that decided. Definitions and thresholds: docs/quality.md.

Indices (per lead and window):

- ``fault_fraction`` (flat + clipped + missing share) and its parts;
- ``amplitude_mv``: 99th minus 1st percentile of the filtered lead;
- ``ksqi``: kurtosis of the filtered lead; ``ssqi``: its skewness (Li, Mark & Clifford 2008);
- ``psqi``: power 5-15 Hz over 5-40 Hz; ``bassqi``: 1 - power 0-1 Hz over 0-40 Hz, before baseline
  removal (Li et al. 2008; Clifford et al. 2012);
- ``bsqi``: agreement of our detector with ``neurokit2``'s within 150 ms, matched over the union;
- ``line_ratio``: power within 1 Hz of mains and harmonics after the notch, over total;
- ``hf_ratio``: power above 40 Hz over total (muscle);
- ``hr_bpm``, ``max_rr_s``, ``rr_ratio`` and ``tsqi`` (mean correlation of the window's beats with
  their average, Orphanidou et al. 2015).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from .config import WindowsConfig

GRADES = ("good", "noisy", "unusable")
INDEX_COLUMNS = ["fault_fraction", "flat_fraction", "clipped_fraction", "missing_fraction",
                 "amplitude_mv", "ksqi", "ssqi", "psqi", "bassqi", "bsqi", "line_ratio",
                 "hf_ratio", "hr_bpm", "max_rr_s", "rr_ratio", "tsqi", "n_beats"]


def _frames(x: np.ndarray, L: int, fill) -> np.ndarray:
    n_win = max(1, int(np.ceil(x.size / L)))
    pad = np.full(n_win * L, fill, dtype=np.result_type(x.dtype, type(fill)))
    pad[: x.size] = x
    return pad.reshape(n_win, L)


def _band_power(p: np.ndarray, f: np.ndarray, lo: float, hi: float) -> np.ndarray:
    sel = (f >= lo) & (f < hi)
    return p[:, sel].sum(axis=1)


def _match_counts(ours: np.ndarray, other: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray]:
    """Which of ``ours`` have an ``other`` within tol, and which of ``other`` have one of ours."""
    def near(a, b):
        if a.size == 0 or b.size == 0:
            return np.zeros(a.size, bool)
        k = np.searchsorted(b, a)
        lo = np.abs(a - b[np.clip(k - 1, 0, b.size - 1)])
        hi = np.abs(b[np.clip(k, 0, b.size - 1)] - a)
        return np.minimum(lo, hi) <= tol
    return near(ours, other), near(other, ours)


def lead_windows(notched: np.ndarray, filtered: np.ndarray, bad: dict[str, np.ndarray], fs: float,
                 ours: np.ndarray, other: np.ndarray, mains_hz: float | None,
                 cfg: WindowsConfig = WindowsConfig(), grade: bool = True) -> pd.DataFrame:
    """Indices and grade of every window of one lead.

    Parameters
    ----------
    notched, filtered : (n_samples,) the lead after the notch only, and after every filter.
    bad : {"flat", "clipped", "missing"} -> bool masks (n_samples,).
    ours, other : sorted R positions from our detector and from the second detector.

    Returns a DataFrame with ``start``, ``end``, ``grade``, ``decided_by`` and the indices.
    With ``grade=False`` only the fault shares are computed and every window is ``good``.

    >>> fs = 250.0; t = np.arange(int(30 * fs)) / fs
    >>> x = np.zeros(t.size); x[125::250] = 1.0; x = np.convolve(x, np.hanning(11), "same")
    >>> r = np.arange(125, t.size, 250)
    >>> z = np.zeros(t.size, bool); w = lead_windows(x, x, {"flat": z, "clipped": z, "missing": z},
    ...                                            fs, r, r, None)
    >>> w.grade.tolist()
    ['good', 'good', 'good']
    """
    n = filtered.size
    L = int(round(cfg.window_s * fs))
    n_win = max(1, int(np.ceil(n / L)))
    starts = np.arange(n_win) * L
    ends = np.minimum(starts + L, n)
    cnt = (ends - starts).astype(float)
    out = {"start": starts, "end": ends}
    fault = np.zeros(n_win)
    for key in ("flat", "clipped", "missing"):
        share = np.add.reduceat(bad[key].astype(np.int32), starts) / cnt
        out[f"{key}_fraction"] = share
        fault += share
    out["fault_fraction"] = np.minimum(fault, 1.0)
    if not grade:
        df = pd.DataFrame(out)
        for c in INDEX_COLUMNS:
            if c not in df:
                df[c] = np.nan
        df.insert(2, "grade", "good")
        df.insert(3, "decided_by", "")
        df.insert(4, "noise_grade", "good")
        return df
    # moments without nan-functions: the last window is zero-padded and its count is exact
    fx = _frames(filtered, L, 0.0)
    valid = np.arange(n_win * L).reshape(n_win, L) < n
    m = fx.sum(axis=1) / cnt
    d = (fx - m[:, None]) * valid
    d2 = d * d
    m2 = d2.sum(axis=1) / cnt
    m2s = np.where(m2 > 1e-20, m2, np.nan)
    out["ksqi"] = np.nan_to_num((d2 * d2).sum(axis=1) / cnt / m2s ** 2, nan=0.0)
    out["ssqi"] = np.nan_to_num((d2 * d).sum(axis=1) / cnt / m2s ** 1.5, nan=0.0)
    amp = np.empty(n_win)
    full = n // L
    step = max(1, int(fs // 90))  # the filtered lead holds nothing above 40 Hz: 90 Hz suffices
    if full:
        q = np.percentile(fx[:full, ::step], [1, 99], axis=1)
        amp[:full] = q[1] - q[0]
    if full < n_win:
        q = np.percentile(filtered[full * L:], [1, 99])
        amp[full:] = q[1] - q[0]
    out["amplitude_mv"] = amp
    # spectra of the notched lead (baseline still in, for basSQI); windows zero-padded at the end
    nx = _frames(notched, L, 0.0)
    nx = (nx - (nx.sum(axis=1) / cnt)[:, None]) * valid
    p = np.abs(np.fft.rfft(nx * np.hanning(L), axis=1)) ** 2
    f = np.fft.rfftfreq(L, 1 / fs)
    tot = np.maximum(p[:, 1:].sum(axis=1), 1e-30)
    p540 = _band_power(p, f, 5, 40)
    out["psqi"] = _band_power(p, f, 5, 15) / np.maximum(p540, 1e-30)
    out["bassqi"] = 1 - _band_power(p, f, 0.01, 1) / np.maximum(_band_power(p, f, 0.01, 40), 1e-30)
    line = np.zeros(n_win)
    if mains_hz:
        k = 1
        while k * mains_hz < fs / 2:
            line += _band_power(p, f, k * mains_hz - 1, k * mains_hz + 1)
            k += 1
    out["line_ratio"] = line / tot
    out["hf_ratio"] = _band_power(p, f, 40, fs / 2 + 1) / tot if fs / 2 > 40 else np.zeros(n_win)
    # bSQI: our detections against the second detector's
    tol = 0.15 * fs
    a_ok, b_ok = _match_counts(ours, other, tol)
    wa, wb = (ours // L).astype(np.int64), (other // L).astype(np.int64)
    n_a = np.bincount(wa, minlength=n_win)[:n_win]
    n_b = np.bincount(wb, minlength=n_win)[:n_win]
    matched = np.minimum(np.bincount(wa, weights=a_ok, minlength=n_win)[:n_win],
                         np.bincount(wb, weights=b_ok, minlength=n_win)[:n_win])
    union = n_a + n_b - matched
    out["bsqi"] = np.where(union > 0, matched / np.maximum(union, 1), np.nan)
    out["n_beats"] = n_a
    # rhythm from our detections: RRs counted in the window of their second beat
    rr = np.diff(ours) / fs
    wr = wa[1:] if ours.size > 1 else np.zeros(0, np.int64)
    g = pd.Series(rr).groupby(wr)
    hr = np.full(n_win, np.nan)
    mx = np.full(n_win, np.nan)
    ratio = np.full(n_win, np.nan)
    if rr.size:
        med, big, small = g.median(), g.max(), g.min()
        hr[med.index] = 60.0 / med.to_numpy()
        mx[big.index] = big.to_numpy()
        ratio[big.index] = big.to_numpy() / np.maximum(small.to_numpy(), 1e-9)
    out["hr_bpm"], out["max_rr_s"], out["rr_ratio"] = hr, mx, ratio
    out["tsqi"] = _template_sqi(filtered, ours, wa, fs, n_win)
    df = pd.DataFrame(out)
    grade, why = grade_windows(df, cfg)
    df.insert(2, "grade", grade)
    df.insert(3, "decided_by", why)
    rhythm = {"hr_bpm", "max_rr_s", "rr_ratio"}
    # the grade from noise tests alone: rhythm findings (bigeminy, pauses) are not noise
    df.insert(4, "noise_grade", [g if g != "noisy" or set(w.split(";")) - rhythm else "good"
                                 for g, w in zip(grade, why)])
    return df


def _template_sqi(x: np.ndarray, r: np.ndarray, w: np.ndarray, fs: float, n_win: int) -> np.ndarray:
    """Mean correlation of each window's beats (-150..+350 ms) with the window's average beat."""
    a, b = int(round(0.15 * fs)), int(round(0.35 * fs))
    ok = (r >= a) & (r < x.size - b)
    out = np.full(n_win, np.nan)
    if ok.sum() < 2:
        return out
    r, w = r[ok], w[ok]
    seg = x[r[:, None] + np.arange(-a, b)]
    seg = seg - seg.mean(axis=1, keepdims=True)
    tpl = np.zeros((n_win, seg.shape[1]))
    np.add.at(tpl, w, seg)
    cnt = np.bincount(w, minlength=n_win)[:n_win]
    tpl /= np.maximum(cnt, 1)[:, None]
    t = tpl[w]
    c = (seg * t).sum(1) / np.sqrt((seg * seg).sum(1) * (t * t).sum(1) + 1e-30)
    s = np.bincount(w, weights=c, minlength=n_win)[:n_win]
    out = np.where(cnt >= 2, s / np.maximum(cnt, 1), np.nan)
    return out


def grade_windows(df: pd.DataFrame, cfg: WindowsConfig) -> tuple[list[str], list[str]]:
    """Grade each window from its indices; returns grades and the ';'-joined deciding tests."""
    lo_a, hi_a = cfg.amplitude_range_mv
    unusable = {
        "fault_fraction": df.fault_fraction > cfg.unusable_fault_fraction,
        "amplitude_mv": (df.amplitude_mv < lo_a) | (df.amplitude_mv > hi_a),
        "bsqi": df.bsqi.fillna(0) < cfg.bsqi_unusable,
        "tsqi": df.tsqi.fillna(-1) < cfg.tsqi_unusable,
    }
    lo_p, hi_p = cfg.psqi_range
    lo_h, hi_h = cfg.hr_range_bpm
    noisy = {
        "fault_fraction": df.fault_fraction > cfg.noisy_fault_fraction,
        "ksqi": df.ksqi < cfg.ksqi_min,
        "psqi": (df.psqi < lo_p) | (df.psqi > hi_p),
        "bassqi": df.bassqi < cfg.bassqi_min,
        "bsqi": df.bsqi.fillna(0) < cfg.bsqi_noisy,
        "tsqi": df.tsqi.fillna(-1) < cfg.tsqi_noisy,
        "hr_bpm": (df.hr_bpm < lo_h) | (df.hr_bpm > hi_h),
        "max_rr_s": df.max_rr_s > cfg.max_rr_s,
        "rr_ratio": df.rr_ratio > cfg.rr_ratio_max,
        "line_ratio": df.line_ratio > cfg.line_ratio_max,
        "hf_ratio": df.hf_ratio > cfg.hf_ratio_max,
    }
    U = pd.DataFrame(unusable).to_numpy()
    N = pd.DataFrame(noisy).to_numpy()
    names_u, names_n = list(unusable), list(noisy)
    grades, why = [], []
    for u, nz in zip(U, N):  # one step per window
        if u.any():
            grades.append("unusable")
            why.append(";".join(n for n, b in zip(names_u, u) if b))
        elif nz.any():
            grades.append("noisy")
            why.append(";".join(n for n, b in zip(names_n, nz) if b))
        else:
            grades.append("good")
            why.append("")
    return grades, why


def grade_codes(grades) -> np.ndarray:
    """good/noisy/unusable as 0/1/2."""
    return np.array([GRADES.index(g) for g in grades], dtype=np.int8)
