"""Dataset-scope normalization statistics, exact, streamed a lead and a batch at a time."""
from __future__ import annotations

import logging

import numpy as np

log = logging.getLogger("prep")


BATCH = 4096  # beats normalized at once: ~16 MB of float64 per lead at 256 samples


def lead_stats(method: str, n_leads: int, stream) -> tuple[np.ndarray, np.ndarray]:
    """Per-lead (centre, scale) over the unmasked leads of the beat batches ``stream()``
    yields as (beats, mask). ``stream`` is called once per pass: one pass for zscore and minmax;
    robust (median and IQR, exact, as ``numpy.percentile``) narrows a value interval per
    quantile with histograms over a few passes, so memory stays bounded by one batch plus at
    most ``_EXACT`` values per quantile instead of holding every value."""
    c, s = np.zeros(n_leads), np.ones(n_leads)
    if method == "none":
        return c, s
    sm, sq, cnt = np.zeros(n_leads), np.zeros(n_leads), np.zeros(n_leads, np.int64)
    lo, hi = np.full(n_leads, np.inf), np.full(n_leads, -np.inf)
    for beats, mk in stream():
        for j in range(n_leads):
            v = beats[mk[:, j], j]
            if v.size:
                sm[j] += v.sum()
                sq[j] += (v * v).sum()
                cnt[j] += v.size
                lo[j] = min(lo[j], v.min())
                hi[j] = max(hi[j], v.max())
    for j in range(n_leads):
        if cnt[j] == 0:
            continue
        if method == "zscore":
            c[j] = sm[j] / cnt[j]
            s[j] = np.sqrt(max(sq[j] / cnt[j] - c[j] ** 2, 0.0))
        elif method == "minmax":
            c[j], s[j] = lo[j], hi[j] - lo[j]
        else:
            q1, q2, q3 = _exact_percentiles(stream, j, int(cnt[j]), lo[j], hi[j], (25, 50, 75))
            c[j], s[j] = q2, q3 - q1
    s = np.where(s > 1e-6, s, 1.0)
    return c, s


_EXACT = 1 << 20  # values gathered for an exact quantile once its interval holds this few


def _exact_percentiles(stream, lead: int, n: int, lo: float, hi: float, qs) -> list[float]:
    """Exact ``numpy.percentile`` (linear interpolation) of one lead's values, found without
    holding them all: each needed order statistic is located by histogram passes that narrow
    its value interval, then read exactly from the few values left in it."""
    def values(a, b, closed):
        for beats, mk in stream():
            v = beats[mk[:, lead], lead].ravel()
            yield v[(v >= a) & ((v <= b) if closed else (v < b))]

    def order_stat(rank: int) -> float:
        a, b, closed, below = lo, hi, True, 0  # `below` values lie under the interval
        while a < b:
            edges = np.linspace(a, b, 1025)
            if not (edges[0] < edges[1] and edges[-2] < edges[-1]):
                break  # as narrow as floating point allows
            hist = np.zeros(1024, np.int64)
            for v in values(a, b, closed):
                hist += np.histogram(v, edges)[0]  # last bin closed; half-open input skips b
            cum = below + np.cumsum(hist)
            i = min(int(np.searchsorted(cum, rank, side="right")), 1023)
            a, b, closed = edges[i], edges[i + 1], closed and i == 1023
            below = int(cum[i] - hist[i])
            if hist[i] <= _EXACT:
                break
        if a >= b:
            return float(a)
        got = np.sort(np.concatenate(list(values(a, b, closed))))
        return float(got[rank - below]) if got.size > rank - below else float(a)

    found: dict[int, float] = {}
    out = []
    for q in qs:
        h = (n - 1) * q / 100.0
        k = int(np.floor(h))
        k1 = min(n - 1, k + 1)
        for r in (k, k1):
            if r not in found:
                found[r] = order_stat(r)
        out.append(found[k] + (h - k) * (found[k1] - found[k]))
    return out
