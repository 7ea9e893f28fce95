"""Multi-lead fusion of the R-peak stage: per-lead detections in, one beat list out.

A helper of :mod:`prep.stages.rpeaks` (a stage imports no other stage, only such helpers).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from prep.arrays import sorted_median
from prep.config import RpeaksConfig

PRUNE_RR = 1.4           # the detector's pruning rule, reused by between_beats (tuned, docs/rpeaks.md)
QUALITY_WINDOW_S = 10.0  # local-quality window for fusion (common SQI window length)


def running_median(v: np.ndarray, n: int) -> np.ndarray:
    """Centred running median over ``n`` values (fewer at the ends), as pandas'
    ``rolling(n, center=True, min_periods=1).median()`` (the reference in tests/stages): every
    window sorted at once, its middle value or the mean of its two middle ones; NaN input goes to
    pandas, which skips NaN."""
    v = np.asarray(v, dtype=np.float64)
    if n % 2 == 0 or v.size == 0 or np.isnan(v).any():
        return pd.Series(v).rolling(n, center=True, min_periods=1).median().to_numpy()
    win, k = _sorted_windows(v, n, n // 2)
    i = np.arange(v.size)
    lo, hi = win[i, (k - 1) // 2], win[i, k // 2]
    return np.where(k % 2 == 1, lo, (lo + hi) / 2)


def _sorted_windows(v: np.ndarray, n: int, before: int) -> tuple[np.ndarray, np.ndarray]:
    """Each value's window of ``n`` values starting ``before`` values earlier (pandas' centred
    window), sorted, cut short at the ends (padded with inf, which sorts last); and how many
    values each window holds."""
    i = np.arange(v.size)
    padded = np.concatenate([np.full(before, np.inf), v, np.full(n, np.inf)])
    win = np.sort(padded[i[:, None] + np.arange(n)[None, :]], axis=1)
    return win, np.minimum(i - before + n, v.size) - np.maximum(i - before, 0)


def running_quantile(v: np.ndarray, n: int, q: float) -> np.ndarray:
    """Centred running ``q``-quantile over ``n`` values (fewer at the ends), as pandas'
    ``rolling(n, center=True, min_periods=1).quantile(q)`` (linear interpolation; the reference
    in tests/stages); NaN input goes to pandas."""
    v = np.asarray(v, dtype=np.float64)
    if v.size == 0 or np.isnan(v).any():
        return pd.Series(v).rolling(n, center=True, min_periods=1).quantile(q).to_numpy()
    win, k = _sorted_windows(v, n, n // 2)
    i = np.arange(v.size)
    pos = q * (k - 1)
    j = np.floor(pos).astype(np.int64)
    frac = pos - j
    lo = win[i, j]
    hi = np.where(frac > 0, win[i, np.minimum(j + 1, n - 1)], lo)
    return np.where(frac > 0, lo + (hi - lo) * frac, lo)


@dataclass
class LeadEvidence:
    """What one lead brings to fusion. ``peaks``: refined R positions (sorted); ``conf``: the
    detector's confidence per peak; ``quality``: template quality per ``QUALITY_WINDOW_S``
    window; ``valid``: per peak, False inside unusable stretches; ``window_ok``: per quality
    window of the caller's ``window_len``, False where the lead is unusable; ``clean``: per such
    window, graded good by the noise tests; ``energy``: per sample, QRS energy over the local
    reference (from the detector)."""

    peaks: np.ndarray
    conf: np.ndarray
    quality: np.ndarray
    valid: np.ndarray | None = None
    window_ok: np.ndarray | None = None
    clean: np.ndarray | None = None
    energy: np.ndarray | None = None


@dataclass
class Fused:
    """Beats after fusion. ``support[i, j]``: lead j saw beat i; ``accepted``: fusion kept it."""

    r: np.ndarray
    support: np.ndarray
    confidence: np.ndarray
    accepted: np.ndarray
    r_lead: np.ndarray
    unusable: np.ndarray | None = None  # seen only in unusable stretches
    between: np.ndarray | None = None   # a minority detection inside one cardiac cycle


def primary_lead(quality: list[np.ndarray]) -> int:
    """Index of the lead with the best median window quality (ties: the first)."""
    if not quality:
        return 0
    med = [float(sorted_median(q[~np.isnan(q)])) if np.isfinite(q).any() else -1.0
           for q in quality]  # np.nanmedian's value, without its slow path for short arrays
    return int(np.argmax(med))


@dataclass
class _Clusters:
    """Detections of all leads grouped into candidate beats (one row per cluster)."""

    r: np.ndarray        # R of each cluster: the primary lead's if it saw it, else the next lead's
    r_lead: np.ndarray   # the lead that R comes from
    seen: np.ndarray     # (n_c, n_leads): the lead detected the beat
    support: np.ndarray  # (n_c, n_leads): ... outside an unusable stretch
    best: np.ndarray     # highest confidence of the cluster
    conf: np.ndarray     # (n_c, n_leads): each lead's confidence for the beat


def _clusters(leads: list[LeadEvidence], order: list[int], tol: int) -> _Clusters:
    """Anchored on the primary lead (first in ``order``), the others matched to the nearest
    anchor within ``tol`` samples; a cluster holding two detections of one lead is split at the
    gap between them."""
    n_leads = len(leads)
    pos_all = np.concatenate([leads[j].peaks for j in order])
    lead_all = np.concatenate([np.full(leads[j].peaks.size, j) for j in order])
    conf_all = np.concatenate([leads[j].conf for j in order])
    valid_all = np.concatenate([leads[j].valid if leads[j].valid is not None
                                else np.ones(leads[j].peaks.size, bool) for j in order])
    srt = np.argsort(pos_all, kind="stable")
    pos_s, lead_s, conf_s, valid_s = pos_all[srt], lead_all[srt], conf_all[srt], valid_all[srt]
    new = np.r_[True, np.diff(pos_s) > tol]
    cid = np.cumsum(new) - 1
    dup = np.r_[False, (lead_s[1:] == lead_s[:-1]) & (cid[1:] == cid[:-1])]
    if dup.any():
        new = new | dup
        cid = np.cumsum(new) - 1
    n_c = int(cid[-1]) + 1
    seen = np.zeros((n_c, n_leads), bool)
    seen[cid, lead_s] = True
    support = np.zeros((n_c, n_leads), bool)
    support[cid[valid_s], lead_s[valid_s]] = True
    best = np.zeros(n_c)
    np.maximum.at(best, cid, conf_s)
    conf_m = np.zeros((n_c, n_leads))
    np.maximum.at(conf_m, (cid, lead_s), conf_s)
    rank = np.empty(n_leads, np.int64)
    rank[order] = np.arange(n_leads)
    pick = np.lexsort((rank[lead_s], cid))
    first = pick[np.r_[True, cid[pick][1:] != cid[pick][:-1]]]
    return _Clusters(pos_s[first], lead_s[first], seen, support, best, conf_m)


def _at(per_window: list[np.ndarray], r: np.ndarray, window_len: int) -> np.ndarray:
    """(n_c, n_leads): each lead's per-window value at each beat."""
    return np.column_stack([w[np.clip(r // window_len, 0, w.size - 1)] for w in per_window])


def _minority_ok(c: _Clusters, leads: list[LeadEvidence], primary: int, fs: float,
                 cfg: RpeaksConfig, window_len: int | None, window_s: float):
    """Which minority beats fusion accepts, which beats are unsure (minority, or no lead that
    saw it is clean there), which are clean and strong, and how many leads are usable at each."""
    n_c, n_leads = c.seen.shape
    q = np.vstack([d.quality for d in leads])
    win = np.clip((c.r / (window_s * fs)).astype(np.int64), 0, q.shape[1] - 1)
    good = np.nan_to_num(q[:, win].T, nan=-1.0) >= cfg.min_lead_template_corr
    n_here = np.full(n_c, n_leads)
    has_ok = all(d.window_ok is not None for d in leads) and bool(window_len)
    if has_ok:
        ok_m = _at([d.window_ok for d in leads], c.r, window_len)
        good &= ok_m
        n_here = np.maximum(ok_m.sum(axis=1), 1)
    trusted = np.zeros_like(good)
    trusted[:, primary] = good[:, primary]
    others = [j for j in range(n_leads) if j != primary]
    if others:
        trusted[:, others] = good[:, others] & ~good[:, [primary]]
    n_sup = c.support.sum(1)
    minority_ok = (c.support & trusted).any(1)
    clean_strong = np.zeros(n_c, bool)
    unsure = n_sup < n_here
    if all(d.clean is not None and d.energy is not None for d in leads) and window_len:
        cl = _at([d.clean for d in leads], c.r, window_len)
        if has_ok:
            cl &= ok_m
        e = np.column_stack([d.energy[np.clip(c.r, 0, d.energy.size - 1)] for d in leads])
        contradicted = (cl & ~c.seen & (e < cfg.searchback_threshold)).any(1)
        clean_strong = (c.support & cl & (c.conf >= 1.0)).any(1)
        unsure = unsure | ~(c.support & cl).any(1)
        # trust in a lead's template quality alone holds only where no other usable lead is
        # clean there (it then cannot confirm); next to a clean lead that did not see it, a
        # beat must be clean and strong where it was seen
        other_clean = (cl & ~c.seen).any(1)
        minority_ok = (((c.support & trusted).any(1) & ~other_clean) | clean_strong) & ~contradicted
    return minority_ok, unsure, clean_strong, n_here


def _one_per_refractory(c: _Clusters, accepted: np.ndarray, primary: int, dist: int) -> None:
    """Two accepted beats closer than the refractory period are one beat seen at two places
    (leads disagree on where R is): keep the better supported one, then the primary's."""
    n_sup = c.support.sum(1)
    for _ in range(3):
        ai = np.flatnonzero(accepted)
        close = np.flatnonzero(np.diff(c.r[ai]) < dist)
        if close.size == 0:
            break
        a_, b_ = ai[close], ai[close + 1]
        wa = n_sup[a_] * 2 + c.support[a_, primary]
        wb = n_sup[b_] * 2 + c.support[b_, primary]
        drop = np.where(wa > wb, b_, np.where(wb > wa, a_, np.where(c.best[a_] >= c.best[b_],
                                                                    b_, a_)))
        accepted[drop] = False


def fuse(leads: list[LeadEvidence], fs: float, cfg: RpeaksConfig = RpeaksConfig(),
         window_len: int | None = None, window_s: float = QUALITY_WINDOW_S) -> Fused:
    """Fuse per-lead detections (refined R positions) of the usable leads into one beat list.

    A beat seen by a strict majority of the leads is accepted. A beat seen by fewer is accepted
    only when a lead that saw it is locally trusted: the primary lead (best median window quality)
    where its window quality reaches ``min_lead_template_corr``, or another lead where it reaches
    that and the primary does not. Rejected beats keep their row (reason ``one_lead_only``).

    ``valid`` (per detection): detections in unusable stretches. They
    still form beats, but give no support; a beat with no valid support is not accepted and is
    marked ``unusable``. ``window_ok`` (per quality window of ``window_len`` samples): where a lead is unusable it is neither trusted nor counted in the
    majority, so the leads usable there decide.

    ``clean`` (per lead, per window: graded good by the noise tests) and ``energy`` (per lead,
    per sample: QRS energy over the local reference, from the detector) judge a minority beat
    from the signal, whatever its shape: a lead that is clean where it saw the beat with at
    least a typical beat's QRS energy (confidence >= 1) also trusts it, and a beat is refused
    when a lead that is clean there and did not see it holds no QRS energy at all at that time (below ``searchback_threshold``, the least the detector
    ever takes for a beat): a real heartbeat shows in every lead, if weakly; an artifact in one
    lead does not.
    """
    n_leads = len(leads)
    if n_leads == 0 or sum(d.peaks.size for d in leads) == 0:
        z = np.zeros(0, np.int64)
        return Fused(z, np.zeros((0, n_leads), bool), np.zeros(0), np.zeros(0, bool), z)
    primary = primary_lead([d.quality for d in leads])
    order = [primary] + [j for j in range(n_leads) if j != primary]
    c = _clusters(leads, order, int(round(cfg.fuse_window_ms * fs / 1000)))
    minority_ok, unsure, clean_strong, n_here = _minority_ok(c, leads, primary, fs, cfg,
                                                             window_len, window_s)
    n_sup = c.support.sum(1)
    accepted = ((2 * n_sup > n_here) | minority_ok) & (n_sup > 0)
    _one_per_refractory(c, accepted, primary, int(round(cfg.refractory_ms * fs / 1000)))
    between = between_beats(c.r, accepted, unsure & ~clean_strong)
    accepted &= ~between
    return Fused(c.r.astype(np.int64), c.seen, c.best, accepted, c.r_lead.astype(np.int64),
                 unusable=n_sup == 0, between=between)


def between_beats(r: np.ndarray, accepted: np.ndarray, minority: np.ndarray) -> np.ndarray:
    """Accepted minority detections that sit inside one cardiac cycle of their neighbours.

    A detection that not every usable lead saw, whose two accepted neighbours are no further
    apart than ``PRUNE_RR`` x the local median RR (the detector's own pruning rule), adds a
    complex where the rhythm leaves no room for one: the beats before and after make a normal
    cycle together. Ectopic beats are not of that kind: a ventricular beat is followed by a
    compensatory pause and an atrial premature beat resets the cycle, so their neighbours are
    1.5 to 2 cycles apart. Returns a bool per detection (True: not a heartbeat).

    >>> r = np.array([0, 100, 150, 200, 300, 400])
    >>> between_beats(r, np.ones(6, bool), np.array([0, 0, 1, 0, 0, 0], bool)).tolist()
    [False, False, True, False, False, False]
    """
    out = np.zeros(r.size, bool)
    for _ in range(2):  # a second pass sees neighbours the first one left
        ai = np.flatnonzero(accepted & ~out)
        if ai.size < 4:
            break
        rr = np.diff(r[ai]).astype(float)
        med = running_median(rr, 9)
        span = r[ai[2:]] - r[ai[:-2]]
        hit = np.flatnonzero(minority[ai[1:-1]] & (span < PRUNE_RR * med[1:])) + 1
        hit = hit[np.r_[True, np.diff(hit) > 1]] if hit.size else hit
        if hit.size == 0:
            break
        out[ai[hit]] = True
    return out
