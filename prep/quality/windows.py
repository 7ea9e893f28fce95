"""Window quality stage: grade every lead in fixed windows with signal-quality indices.

For each lead and window (default 10 s) the stage computes direct fault shares, published noise
indices and rhythm measures. The grade (``good``, ``noisy`` or ``unusable``, with the indices that
decided) comes from the noise tests alone; rhythm findings (irregular RR, a long RR, a rate
outside a range) go to their own column, ``rhythm_findings``, and never change the grade: ectopy
and pauses are findings about the heart, not noise. Definitions and thresholds: docs/quality.md.

Indices (per lead and window):

- ``fault_fraction`` (flat + clipped + missing share) and its parts;
- ``amplitude_mv``: 99th minus 1st percentile of the filtered lead;
- ``ksqi``: kurtosis of the filtered lead; ``ssqi``: its skewness (Li, Mark & Clifford 2008);
- ``psqi``: power 5-15 Hz over 5-40 Hz; ``bassqi``: 1 - power 0-1 Hz over 0-40 Hz, before baseline
  removal (Li et al. 2008; Clifford et al. 2012);
- ``bsqi``: agreement of our detector with ``neurokit2``'s within 150 ms, matched over the union;
- ``line_share``: power within 1 Hz of mains and harmonics after the notch, over total;
- ``hf_share``: power above 40 Hz over total (muscle);
- ``tsqi``: beat-to-beat similarity, after Orphanidou et al. 2015, but each beat is compared with
  the beats of the whole lead that resemble it most (its ``k``-th best correlation), not with one
  average: a window of bigeminy is as similar as a window of sinus beats, noise is not;
- rhythm (reported, never graded): ``hr_bpm``, ``max_rr_s``, ``rr_ratio``.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from prep.config import WindowsConfig

GRADES = ("good", "noisy", "unusable")
#: rhythm finding -> the window index it reads (column ``rhythm_findings``; never part of the grade)
RHYTHM_FINDINGS = {"rate_out_of_range": "hr_bpm", "long_rr": "max_rr_s", "irregular_rr": "rr_ratio"}
_TSQI_K = 3            # a beat must resemble this many other beats of its lead (as qrs_match)
_TSQI_LIBRARY = 1000   # at most this many beats of the lead, evenly spread, are compared
_TSQI_POINTS = 64      # points per beat segment (the lead is low-passed at 40 Hz)
INDEX_COLUMNS = ["fault_fraction", "flat_fraction", "clipped_fraction", "missing_fraction",
                 "amplitude_mv", "ksqi", "ssqi", "psqi", "bassqi", "bsqi", "line_share",
                 "hf_share", "hr_bpm", "max_rr_s", "rr_ratio", "tsqi", "tsqi_average", "n_beats"]


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
        df.insert(4, "rhythm_findings", "")
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
    out["line_share"] = line / tot
    out["hf_share"] = _band_power(p, f, 40, fs / 2 + 1) / tot if fs / 2 > 40 else np.zeros(n_win)
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
    out["tsqi_average"] = _average_sqi(filtered, ours, wa, fs, n_win)
    df = pd.DataFrame(out)
    grade, why = grade_windows(df, cfg)
    df.insert(2, "grade", grade)
    df.insert(3, "decided_by", why)
    df.insert(4, "rhythm_findings", rhythm_findings(df, cfg))
    return df


def beat_similarity(x: np.ndarray, r: np.ndarray, fs: float, k: int = _TSQI_K,
                    max_library: int = _TSQI_LIBRARY) -> np.ndarray:
    """How much each beat resembles the beats of its own kind in one lead, in [-1, 1].

    Each beat's segment (-150..+350 ms of the filtered lead ``x``, mean removed, at most
    ``_TSQI_POINTS`` points) is correlated with every beat of a library (at most ``max_library``
    beats of the lead, evenly spread); the score is the ``k``-th best correlation, the beat itself
    left out. A beat of any morphology that recurs in the lead (sinus, a recurring ventricular
    shape, an aberrant conduction) scores high; noise, which does not recur, scores low. With
    fewer than ``k + 1`` beats, ``k`` shrinks to what there is. NaN for beats too near the edges.

    >>> fs = 250.0; n = int(20 * fs); x = np.zeros(n)
    >>> r = np.arange(125, n - 100, 250); x[r] = 1.0           # narrow beats ...
    >>> x[r[1::2] - 5] = -1.0                                  # ... every second one different
    >>> x = np.convolve(x, np.hanning(9), "same")
    >>> bool(np.nanmin(beat_similarity(x, r, fs)) > 0.99)
    True
    """
    a, b = int(round(0.15 * fs)), int(round(0.35 * fs))
    out = np.full(r.size, np.nan)
    ok = np.flatnonzero((r >= a) & (r < x.size - b))
    if ok.size < 2:
        return out
    step = max(1, (a + b) // _TSQI_POINTS)
    off = np.arange(-a, b, step)
    seg = x[r[ok][:, None] + off].astype(np.float32)
    seg -= seg.mean(axis=1, keepdims=True)
    seg /= np.maximum(np.linalg.norm(seg, axis=1, keepdims=True), 1e-9)
    lib_i = (np.linspace(0, ok.size - 1, max_library).round().astype(int)
             if ok.size > max_library else np.arange(ok.size))
    lib = seg[lib_i]
    kk = int(min(k, lib_i.size - 1))
    pos_in_lib = np.full(ok.size, -1)
    pos_in_lib[lib_i] = np.arange(lib_i.size)
    for s0 in range(0, ok.size, 2048):
        i = np.arange(s0, min(ok.size, s0 + 2048))
        c = seg[i] @ lib.T
        own = pos_in_lib[i] >= 0
        c[np.flatnonzero(own), pos_in_lib[i][own]] = -np.inf
        out[ok[i]] = np.partition(c, c.shape[1] - kk, axis=1)[:, c.shape[1] - kk]
    return out


def _template_sqi(x: np.ndarray, r: np.ndarray, w: np.ndarray, fs: float, n_win: int) -> np.ndarray:
    """Mean :func:`beat_similarity` of each window's beats (NaN where the window holds none)."""
    out = np.full(n_win, np.nan)
    sim = beat_similarity(x, r, fs)
    ok = np.isfinite(sim)
    if not ok.any():
        return out
    cnt = np.bincount(w[ok], minlength=n_win)[:n_win]
    tot = np.bincount(w[ok], weights=sim[ok], minlength=n_win)[:n_win]
    return np.where(cnt >= 1, tot / np.maximum(cnt, 1), np.nan)


def _average_sqi(x: np.ndarray, r: np.ndarray, w: np.ndarray, fs: float, n_win: int) -> np.ndarray:
    """Mean correlation of each window's beats (-150..+350 ms) with the window's average beat
    (Orphanidou et al. 2015). Not part of the grade (ectopy lowers it as much as noise does);
    it only keeps windows of mixed shapes out of the clean-beat library of ``qrs_match``."""
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
    return np.where(cnt >= 2, s / np.maximum(cnt, 1), np.nan)


def rhythm_findings(df: pd.DataFrame, cfg: WindowsConfig) -> list[str]:
    """';'-joined rhythm findings of each window (``''`` when none): reported, never graded.

    ``rate_out_of_range``: median heart rate outside ``hr_range_bpm``; ``long_rr``: longest RR
    above ``max_rr_s``; ``irregular_rr``: longest over shortest RR above ``max_rr_ratio``.
    """
    lo_h, hi_h = cfg.hr_range_bpm
    hit = {"rate_out_of_range": (df.hr_bpm < lo_h) | (df.hr_bpm > hi_h),
           "long_rr": df.max_rr_s > cfg.max_rr_s,
           "irregular_rr": df.rr_ratio > cfg.max_rr_ratio}
    H = pd.DataFrame(hit).to_numpy()
    names = list(hit)
    return [";".join(n for n, b in zip(names, row) if b) for row in H]


def grade_windows(df: pd.DataFrame, cfg: WindowsConfig) -> tuple[list[str], list[str]]:
    """Grade each window from its noise indices; returns grades and the ';'-joined deciding
    tests. Rhythm measures take no part (see :func:`rhythm_findings`)."""
    lo_a, hi_a = cfg.amplitude_range_mv
    unusable = {
        "fault_fraction": df.fault_fraction > cfg.unusable_fault_fraction,
        "amplitude_mv": (df.amplitude_mv < lo_a) | (df.amplitude_mv > hi_a),
        "bsqi": df.bsqi.fillna(0) < cfg.bsqi_unusable,
        "tsqi": df.tsqi.fillna(-1) < cfg.tsqi_unusable,
    }
    lo_p, hi_p = cfg.psqi_range
    noisy = {
        "fault_fraction": df.fault_fraction > cfg.noisy_fault_fraction,
        "ksqi": df.ksqi < cfg.min_ksqi,
        "psqi": (df.psqi < lo_p) | (df.psqi > hi_p),
        "bassqi": df.bassqi < cfg.min_bassqi,
        "bsqi": df.bsqi.fillna(0) < cfg.bsqi_noisy,
        "tsqi": df.tsqi.fillna(-1) < cfg.tsqi_noisy,
        "line_share": df.line_share > cfg.max_line_share,
        "hf_share": df.hf_share > cfg.max_hf_share,
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


_FAULT_ORDER = ["fault_fraction", "amplitude_mv", "bsqi", "tsqi", "ksqi", "bassqi", "psqi",
                "hf_share", "line_share", "hr_bpm", "max_rr_s", "rr_ratio"]


def main_fault(w: pd.DataFrame) -> str:
    """The test that most often decided a lead's non-good windows ('' when all good); ties go to
    the more direct test, and a fault share is named by its kind (flat, clipped, missing)."""
    bad = w[w["grade"] != "good"]
    parts = [p for cell in bad["decided_by"] for p in cell.split(";") if p]
    if not parts:
        return ""
    rank = {k: i for i, k in enumerate(_FAULT_ORDER)}
    top = min(set(parts), key=lambda k: (-parts.count(k), rank.get(k, 99)))
    if top == "fault_fraction":
        kinds = {k: float(bad[f"{k}_fraction"].sum()) for k in ("flat", "clipped", "missing")}
        return max(kinds, key=kinds.get)
    return top
