"""Window quality indices: one function per index in :data:`INDICES`, one entry per noise test
in :data:`NOISE_TESTS` and per rhythm finding in :data:`RHYTHM_TESTS`.

Every index function reads one :class:`Frames` (a lead cut into windows, with its spectra and
detections, computed once) and returns its columns, one value per window. Adding an index:
write its function here, list it in ``INDICES``, give it a test in ``NOISE_TESTS`` (or
``RHYTHM_TESTS``, which never change a grade) and its threshold in
:class:`prep.config.WindowsConfig`; document it in docs/quality.md. Definitions and sources:
docs/quality.md.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Callable

import numpy as np

from prep.arrays import group_medians, kth_largest

_TSQI_K = 3            # a beat must resemble this many other beats of its lead (as qrs_match)
_TSQI_LIBRARY = 1000   # at most this many beats of the lead, evenly spread, are compared
_TSQI_POINTS = 64      # points per beat segment (the lead is low-passed at 40 Hz)
_BSQI_TOL_S = 0.15     # Li, Mark & Clifford 2008: beats match within 150 ms


def frames_of(x: np.ndarray, L: int, fill) -> np.ndarray:
    """``x`` cut into rows of ``L`` samples, the last one padded with ``fill``; for ``x`` of
    shape (n_leads, n), each lead's rows one lead after another."""
    x2 = np.atleast_2d(x)
    n_win = max(1, int(np.ceil(x2.shape[1] / L)))
    pad = np.full((x2.shape[0], n_win * L), fill, dtype=np.result_type(x2.dtype, type(fill)))
    pad[:, : x2.shape[1]] = x2
    return pad.reshape(x2.shape[0] * n_win, L)


@dataclass
class Frames:
    """One lead in windows of ``L`` samples: what every index reads, each part computed once.

    ``filtered``: the lead after every filter; ``notched``: after the notch only (baseline in,
    for basSQI); ``ours``/``other``: sorted R positions of our detector and the second one.
    ``filtered`` and ``notched`` may also be several leads (n_leads, n): then the windows are
    each lead's windows one lead after another, for the indices that read the signal only
    (:data:`SIGNAL_INDICES`), computed for every lead at once.
    """

    filtered: np.ndarray
    notched: np.ndarray
    fs: float
    L: int
    ours: np.ndarray
    other: np.ndarray
    mains_hz: float | None

    @cached_property
    def n_leads(self) -> int:
        return 1 if self.filtered.ndim == 1 else self.filtered.shape[0]

    @cached_property
    def lead_len(self) -> int:
        return self.filtered.shape[-1]

    @cached_property
    def per_lead(self) -> int:
        """Windows per lead."""
        return max(1, int(np.ceil(self.lead_len / self.L)))

    @cached_property
    def n_win(self) -> int:
        return self.n_leads * self.per_lead

    @cached_property
    def starts(self) -> np.ndarray:
        return np.tile(np.arange(self.per_lead) * self.L, self.n_leads)

    @cached_property
    def count(self) -> np.ndarray:
        """Samples in each window (the last of a lead may be short)."""
        return (np.minimum(self.starts + self.L, self.lead_len) - self.starts).astype(float)

    @cached_property
    def valid(self) -> np.ndarray:
        one = np.arange(self.per_lead * self.L).reshape(self.per_lead, self.L) < self.lead_len
        return np.tile(one, (self.n_leads, 1))

    @cached_property
    def rows(self) -> np.ndarray:
        """The filtered lead as (n_win, L), the last window zero-padded."""
        return frames_of(self.filtered, self.L, 0.0)

    @cached_property
    def spectrum(self) -> tuple[np.ndarray, np.ndarray]:
        """Hann-windowed power spectra of the notched lead's windows (mean removed) and their
        frequencies."""
        nx = frames_of(self.notched, self.L, 0.0)
        nx = (nx - (self.row_sum(nx) / self.count)[:, None]) * self.valid
        p = np.abs(np.fft.rfft(nx * np.hanning(self.L), axis=1)) ** 2
        return p, np.fft.rfftfreq(self.L, 1 / self.fs)

    def band(self, lo: float, hi: float) -> np.ndarray:
        p, f = self.spectrum
        return self.row_sum(p[:, (f >= lo) & (f < hi)])

    def row_sum(self, a: np.ndarray) -> np.ndarray:
        """Sum of each row of ``a`` (n_win, m), summed one lead's block at a time: numpy's sum
        over rows of a taller array may add in another order, and the values must not depend on
        how many leads were stacked."""
        if self.n_leads == 1:
            return a.sum(axis=1)
        k = self.per_lead
        return np.concatenate([a[i:i + k].sum(axis=1) for i in range(0, a.shape[0], k)])

    @cached_property
    def window_of_ours(self) -> np.ndarray:
        return (self.ours // self.L).astype(np.int64)


def moments(w: Frames) -> dict[str, np.ndarray]:
    """kSQI and sSQI: kurtosis and skewness of the filtered lead (Li, Mark & Clifford 2008).
    Without nan-functions: the last window is zero-padded and its count is exact."""
    cnt = w.count
    m = w.row_sum(w.rows) / cnt
    d = (w.rows - m[:, None]) * w.valid
    d2 = d * d
    m2 = w.row_sum(d2) / cnt
    m2s = np.where(m2 > 1e-20, m2, np.nan)
    return {"ksqi": np.nan_to_num(w.row_sum(d2 * d2) / cnt / m2s ** 2, nan=0.0),
            "ssqi": np.nan_to_num(w.row_sum(d2 * d) / cnt / m2s ** 1.5, nan=0.0)}


def amplitude(w: Frames) -> dict[str, np.ndarray]:
    """Robust amplitude: 99th minus 1st percentile of the filtered lead, mV."""
    amp = np.empty((w.n_leads, w.per_lead))
    full = w.lead_len // w.L
    step = max(1, int(w.fs // 90))  # the filtered lead holds nothing above 40 Hz: 90 Hz suffices
    if full:
        rows = w.rows.reshape(w.n_leads, w.per_lead, w.L)[:, :full, ::step]
        q = np.percentile(rows.reshape(w.n_leads * full, -1), [1, 99], axis=1)
        amp[:, :full] = (q[1] - q[0]).reshape(w.n_leads, full)
    if full < w.per_lead:
        q = np.percentile(np.atleast_2d(w.filtered)[:, full * w.L:], [1, 99], axis=1)
        amp[:, full] = q[1] - q[0]
    return {"amplitude_mv": amp.ravel()}


def spectral(w: Frames) -> dict[str, np.ndarray]:
    """pSQI (5-15 over 5-40 Hz), basSQI (1 - 0-1 over 0-40 Hz; Li et al. 2008, Clifford et al.
    2012), the residual mains share (within 1 Hz of mains and harmonics) and the share above
    40 Hz (muscle), of the notched lead's spectrum."""
    p, _ = w.spectrum
    tot = np.maximum(w.row_sum(p[:, 1:]), 1e-30)
    line = np.zeros(w.n_win)
    if w.mains_hz:
        k = 1
        while k * w.mains_hz < w.fs / 2:
            line += w.band(k * w.mains_hz - 1, k * w.mains_hz + 1)
            k += 1
    return {"psqi": w.band(5, 15) / np.maximum(w.band(5, 40), 1e-30),
            "bassqi": 1 - w.band(0.01, 1) / np.maximum(w.band(0.01, 40), 1e-30),
            "line_share": line / tot,
            "hf_share": w.band(40, w.fs / 2 + 1) / tot if w.fs / 2 > 40 else np.zeros(w.n_win)}


def _near(a: np.ndarray, b: np.ndarray, tol: float) -> np.ndarray:
    """Which of sorted ``a`` have a sorted ``b`` within ``tol``."""
    if a.size == 0 or b.size == 0:
        return np.zeros(a.size, bool)
    k = np.searchsorted(b, a)
    lo = np.abs(a - b[np.clip(k - 1, 0, b.size - 1)])
    hi = np.abs(b[np.clip(k, 0, b.size - 1)] - a)
    return np.minimum(lo, hi) <= tol


def agreement(w: Frames) -> dict[str, np.ndarray]:
    """bSQI: our detections against the second detector's, matched over the union (Li et al.
    2008), and the number of our beats per window."""
    tol = _BSQI_TOL_S * w.fs
    a_ok, b_ok = _near(w.ours, w.other, tol), _near(w.other, w.ours, tol)
    n = w.n_win
    wa, wb = w.window_of_ours, (w.other // w.L).astype(np.int64)
    n_a = np.bincount(wa, minlength=n)[:n]
    n_b = np.bincount(wb, minlength=n)[:n]
    matched = np.minimum(np.bincount(wa, weights=a_ok, minlength=n)[:n],
                         np.bincount(wb, weights=b_ok, minlength=n)[:n])
    union = n_a + n_b - matched
    return {"bsqi": np.where(union > 0, matched / np.maximum(union, 1), np.nan), "n_beats": n_a}


def rhythm(w: Frames) -> dict[str, np.ndarray]:
    """Median heart rate, longest RR and longest over shortest RR of our detections, each RR
    counted in the window of its second beat (rhythm measures: reported, never graded)."""
    rr = np.diff(w.ours) / w.fs
    wr = w.window_of_ours[1:] if w.ours.size > 1 else np.zeros(0, np.int64)
    hr, mx, ratio = (np.full(w.n_win, np.nan) for _ in range(3))
    if rr.size:  # RRs come in window order: each window's RRs are one slice
        win, first = np.unique(wr, return_index=True)
        med = group_medians(rr, wr)
        big, small = np.maximum.reduceat(rr, first), np.minimum.reduceat(rr, first)
        hr[win] = 60.0 / med
        mx[win] = big
        ratio[win] = big / np.maximum(small, 1e-9)
    return {"hr_bpm": hr, "max_rr_s": mx, "rr_ratio": ratio}


def similarity(w: Frames) -> dict[str, np.ndarray]:
    """tSQI (mean :func:`beat_similarity` of each window's beats) and ``tsqi_average`` (mean
    correlation with the window's average beat, Orphanidou et al. 2015; not graded, it only keeps
    windows of mixed shapes out of the clean-beat library of ``qrs_match``)."""
    x, r, wa, n = w.filtered, w.ours, w.window_of_ours, w.n_win
    return {"tsqi": _mean_per_window(beat_similarity(x, r, w.fs), wa, n, least=1),
            "tsqi_average": _average_sqi(x, r, wa, w.fs, n)}


#: the index functions, in the order of their columns in the window table
INDICES: tuple[Callable[[Frames], dict[str, np.ndarray]], ...] = (
    moments, amplitude, spectral, agreement, rhythm, similarity)
#: those that read the signal only (no detections): computed for all leads of a record at once
SIGNAL_INDICES = (moments, amplitude, spectral)


@dataclass(frozen=True)
class Test:
    """One window test: ``fails(indices, cfg)`` is True where the window fails it
    (``indices``: column name -> one value per window; NaN fails no comparison)."""

    name: str      # the index it reads, as written in decided_by / rhythm_findings
    level: str     # "unusable" or "noisy" (noise tests); "rhythm" for findings
    fails: Callable[[dict, object], np.ndarray]


def _outside(col: str, key: str):
    return lambda d, c: (d[col] < getattr(c, key)[0]) | (d[col] > getattr(c, key)[1])


def _nan(v: np.ndarray, fill: float) -> np.ndarray:
    return np.where(np.isnan(v), fill, v)


#: noise tests, in the order they are named in decided_by (unusable ones decide first)
NOISE_TESTS = (
    Test("fault_fraction", "unusable", lambda d, c: d["fault_fraction"] > c.unusable_fault_fraction),
    Test("amplitude_mv", "unusable", _outside("amplitude_mv", "amplitude_range_mv")),
    Test("bsqi", "unusable", lambda d, c: _nan(d["bsqi"], 0) < c.bsqi_unusable),
    Test("tsqi", "unusable", lambda d, c: _nan(d["tsqi"], -1) < c.tsqi_unusable),
    Test("fault_fraction", "noisy", lambda d, c: d["fault_fraction"] > c.noisy_fault_fraction),
    Test("ksqi", "noisy", lambda d, c: d["ksqi"] < c.min_ksqi),
    Test("psqi", "noisy", _outside("psqi", "psqi_range")),
    Test("bassqi", "noisy", lambda d, c: d["bassqi"] < c.min_bassqi),
    Test("bsqi", "noisy", lambda d, c: _nan(d["bsqi"], 0) < c.bsqi_noisy),
    Test("tsqi", "noisy", lambda d, c: _nan(d["tsqi"], -1) < c.tsqi_noisy),
    Test("line_share", "noisy", lambda d, c: d["line_share"] > c.max_line_share),
    Test("hf_share", "noisy", lambda d, c: d["hf_share"] > c.max_hf_share),
)

#: rhythm findings (column rhythm_findings): reported, never part of the grade
RHYTHM_TESTS = (
    Test("rate_out_of_range", "rhythm", _outside("hr_bpm", "hr_range_bpm")),
    Test("long_rr", "rhythm", lambda d, c: d["max_rr_s"] > c.max_rr_s),
    Test("irregular_rr", "rhythm", lambda d, c: d["rr_ratio"] > c.max_rr_ratio),
)


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
        out[ok[i]] = kth_largest(c, kk)
    return out


def _mean_per_window(v: np.ndarray, w: np.ndarray, n_win: int, least: int) -> np.ndarray:
    """Mean of the finite ``v`` in each window (NaN where fewer than ``least``)."""
    ok = np.isfinite(v)
    if not ok.any():
        return np.full(n_win, np.nan)
    cnt = np.bincount(w[ok], minlength=n_win)[:n_win]
    tot = np.bincount(w[ok], weights=v[ok], minlength=n_win)[:n_win]
    return np.where(cnt >= least, tot / np.maximum(cnt, 1), np.nan)


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
    if w.size < 256:  # a short record: np.add.at's cost per beat is small next to the steps'
        np.add.at(tpl, w, seg)
    else:  # the sum of each window's beats in beat order, as np.add.at adds (w is sorted):
        # step k adds the k-th beat of every window at once (steps: the most beats in a window)
        _, first, cnt_w = np.unique(w, return_index=True, return_counts=True)
        rank = np.arange(w.size) - np.repeat(first, cnt_w)
        by_rank = np.argsort(rank, kind="stable")
        edges = np.searchsorted(rank[by_rank], np.arange(cnt_w.max() + 1))
        for k in range(cnt_w.max()):
            i = by_rank[edges[k]:edges[k + 1]]
            tpl[w[i]] += seg[i]
    cnt = np.bincount(w, minlength=n_win)[:n_win]
    tpl /= np.maximum(cnt, 1)[:, None]
    t = tpl[w]
    c = (seg * t).sum(1) / np.sqrt((seg * seg).sum(1) * (t * t).sum(1) + 1e-30)
    s = np.bincount(w, weights=c, minlength=n_win)[:n_win]
    return np.where(cnt >= 2, s / np.maximum(cnt, 1), np.nan)
