"""R-peak stage: a QRS detector per lead, R refinement with polarity, and multi-lead fusion.

Detector (per lead), after Pan & Tompkins (1985) in spirit but vectorized:

1. QRS emphasis: zero-phase 5-20 Hz Butterworth band-pass, derivative, squared, 100 ms moving
   average, square root (an amplitude-like energy envelope).
2. Candidates: envelope peaks at least ``refractory_ms`` apart (scipy.signal.find_peaks).
3. Acceptance: a candidate is a beat when its height exceeds ``threshold`` x the local reference
   (the 80th percentile of the 16 surrounding candidate heights).
4. Search-back: in an RR gap longer than ``searchback_rr`` x the local median RR, the highest
   candidate above ``searchback_threshold`` x reference is added.
5. Pruning: a beat weaker than both neighbours whose removal leaves an RR no longer than 1.4 x the
   local median is noise between two beats, and is dropped.

The detector's confidence for a beat is its envelope height over the local reference.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import ndimage, signal

from prep.config import RpeaksConfig
from prep.model import StageLog
from prep.stages._checks import as_signal

_REF_CANDIDATES = 16      # candidates in the local reference (common practice, no source)
_REF_QUANTILE = 0.8       # reference = this quantile of candidate heights (tuned, docs/rpeaks.md)
_PRUNE_RR = 1.4           # pruning rule above (tuned, docs/rpeaks.md)
_QUALITY_WINDOW_S = 10.0  # local-quality window for fusion (common SQI window length)


def qrs_envelope(x: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """QRS energy envelope and the 5-20 Hz band signal of ``x`` (..., n_samples)."""
    high = min(20.0, 0.45 * fs)
    sos = signal.butter(3, [5.0, high], btype="bandpass", fs=fs, output="sos")
    band = signal.sosfiltfilt(sos, x, axis=-1, padlen=min(x.shape[-1] - 1, int(fs)))
    d = np.gradient(band, axis=-1) * fs
    w = max(1, int(round(0.1 * fs)))
    env = np.sqrt(np.maximum(ndimage.uniform_filter1d(d * d, w, axis=-1, mode="nearest"), 0.0))
    return env, band


def _sparse_refractory(pos: np.ndarray, height: np.ndarray, dist: int) -> np.ndarray:
    """Keep the highest of any peaks closer than ``dist`` samples (greedy, vectorized)."""
    if pos.size < 2:
        return pos
    z = np.zeros(int(pos[-1]) + 3)
    z[pos + 1] = height
    keep, _ = signal.find_peaks(z, distance=max(1, dist))
    return keep - 1


def _running_median(v: np.ndarray, n: int) -> np.ndarray:
    return pd.Series(v).rolling(n, center=True, min_periods=1).median().to_numpy()


def detect_lead(x, fs: float, cfg: RpeaksConfig = RpeaksConfig()):
    """Detect QRS complexes in one lead.

    Parameters
    ----------
    x : array, shape (n_samples,)
        One filtered lead in mV.

    Returns
    -------
    peaks : int array
        Envelope-peak positions (samples); refine with :func:`refine_r`.
    confidence : float array
        Envelope height over the local reference (1 is a typical beat).
    band : float array
        The 5-20 Hz band signal (used for lead quality).

    Examples
    --------
    >>> fs = 250.0; x = np.zeros(int(20 * fs)); x[125::250] = 1.0   # 60 bpm spikes
    >>> x = np.convolve(x, np.hanning(15), mode="same")
    >>> p, c, _ = detect_lead(x, fs); len(p)
    20
    """
    acc, conf, band, _ = _detect(x, fs, cfg)
    return acc, conf, band


def _detect(x, fs: float, cfg: RpeaksConfig):
    """:func:`detect_lead`, also returning the QRS energy of every sample relative to the local
    reference (the envelope's maximum within ``fuse_window_ms`` over the reference height of the
    nearest candidate): 1 is a typical beat, ``searchback_threshold`` the least the detector
    ever takes for a beat."""
    x = as_signal(x, fs, "detect_lead", min_samples=8)
    if x.ndim != 1:
        raise ValueError(f"detect_lead: one lead expected, got shape {x.shape}")
    env, band = qrs_envelope(x, fs)
    dist = max(1, int(round(cfg.refractory_ms * fs / 1000)))
    cand, _ = signal.find_peaks(env, distance=int(round(0.2 * fs)))
    if cand.size == 0 or np.max(env) <= 0:
        return np.zeros(0, np.int64), np.zeros(0), band, np.zeros(x.size)
    h = env[cand]
    ref = pd.Series(h).rolling(_REF_CANDIDATES, center=True, min_periods=1).quantile(
        _REF_QUANTILE).to_numpy()
    ref = np.maximum(ref, 1e-12)
    acc = _sparse_refractory(cand[h > cfg.threshold * ref], env[cand[h > cfg.threshold * ref]], dist)
    for _ in range(2):  # search back, twice so gaps split by a find can be searched again
        if acc.size < 3:
            break
        rr = np.diff(acc)
        med = _running_median(rr, 9)
        gaps = np.flatnonzero(rr > cfg.searchback_rr * med)
        if gaps.size == 0:
            break
        lo = np.searchsorted(cand, acc[gaps] + dist, side="right")
        hi = np.searchsorted(cand, acc[gaps + 1] - dist, side="left")
        add = []
        for a, b in zip(lo, hi):  # one step per gap, not per sample
            if b <= a:
                continue
            c = cand[a:b]
            ok = h[a:b] > cfg.searchback_threshold * ref[a:b]
            if ok.any():
                add.append(c[ok][np.argmax(h[a:b][ok])])
        if not add:
            break
        acc = np.sort(np.concatenate([acc, add]))
    for _ in range(3):  # prune weak beats between two beats that make a normal RR together
        if acc.size < 4:
            break
        rr = np.diff(acc)
        med = _running_median(rr, 9)
        he = env[acc]
        weak = (he[1:-1] < he[:-2]) & (he[1:-1] < he[2:])
        bad = np.flatnonzero(weak & (rr[:-1] + rr[1:] < _PRUNE_RR * med[1:])) + 1
        if bad.size == 0:
            break
        bad = bad[np.r_[True, np.diff(bad) > 1]]
        acc = np.delete(acc, bad)
    conf = env[acc] / ref[np.clip(np.searchsorted(cand, acc), 0, cand.size - 1)]
    tol = max(1, int(round(cfg.fuse_window_ms * fs / 1000)))
    near = ndimage.maximum_filter1d(env, 2 * tol + 1, mode="nearest")
    energy = near / np.interp(np.arange(x.size), cand, ref)
    return acc.astype(np.int64), conf, band, energy


def lead_polarity(x: np.ndarray, peaks: np.ndarray, half: int) -> int:
    """+1 when the lead's QRS points up (median positive peak larger), else -1."""
    if peaks.size == 0:
        return 1
    seg = x[np.clip(peaks[:, None] + np.arange(-half, half + 1), 0, x.size - 1)]
    return 1 if np.median(seg.max(1)) >= np.median(-seg.min(1)) else -1


def refine_r(x: np.ndarray, peaks: np.ndarray, fs: float, window_ms: float) -> tuple[np.ndarray, int]:
    """Move each peak to the QRS extremum within +-``window_ms`` in the filtered lead ``x``.

    The extremum follows the lead's polarity (so inverted leads work), except in a beat whose
    opposite deflection is over 1.5 times larger (an ectopic beat of other polarity).
    """
    half = int(round(window_ms * fs / 1000))
    pol = lead_polarity(x, peaks, max(half, 1))
    if peaks.size == 0 or half == 0:
        return peaks.copy(), pol
    idx = np.clip(peaks[:, None] + np.arange(-half, half + 1), 0, x.size - 1)
    seg = x[idx]
    up, down = seg.max(1), -seg.min(1)
    use_up = (up >= down / 1.5) if pol > 0 else (up > 1.5 * down)
    pos = np.where(use_up, seg.argmax(1), seg.argmin(1))
    return idx[np.arange(len(peaks)), pos].astype(np.int64), pol


def window_template_quality(band: np.ndarray, peaks: np.ndarray, fs: float,
                            window_s: float = _QUALITY_WINDOW_S) -> np.ndarray:
    """Median correlation of the beats in each window with the lead's QRS template (+-100 ms).

    One value per ``window_s`` window of the record (NaN where the window holds no beat):
    the template-matching SQI of Orphanidou et al. (2015), computed on the 5-20 Hz band.
    """
    n_win = int(np.ceil(band.size / (window_s * fs)))
    out = np.full(max(n_win, 1), np.nan)
    h = int(round(0.1 * fs))
    p = peaks[(peaks >= h) & (peaks < band.size - h)]
    if p.size < 3:
        return out
    seg = band[p[:, None] + np.arange(-h, h + 1)]
    seg = seg - seg.mean(1, keepdims=True)
    tpl = np.median(seg, 0)
    tpl = tpl - tpl.mean()
    c = (seg @ tpl) / np.sqrt((seg * seg).sum(1) * (tpl @ tpl) + 1e-30)
    win = (p / (window_s * fs)).astype(np.int64)
    med = pd.Series(c).groupby(win).median()
    out[med.index.to_numpy()] = med.to_numpy()
    return out


def _primary(quality: list[np.ndarray]) -> int:
    """Index of the lead with the best median window quality (ties: the first)."""
    if not quality:
        return 0
    med = [np.nanmedian(q) if np.isfinite(q).any() else -1.0 for q in quality]
    return int(np.argmax(med))


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


def fuse(peaks: list[np.ndarray], conf: list[np.ndarray], quality: list[np.ndarray], fs: float,
         cfg: RpeaksConfig = RpeaksConfig(), window_s: float = _QUALITY_WINDOW_S,
         valid: list[np.ndarray] | None = None, window_ok: list[np.ndarray] | None = None,
         window_len: int | None = None, clean: list[np.ndarray] | None = None,
         energy: list[np.ndarray] | None = None) -> Fused:
    """Fuse per-lead detections (refined R positions) of the usable leads into one beat list.

    A beat seen by a strict majority of the leads is accepted. A beat seen by fewer is accepted
    only when a lead that saw it is locally trusted: the primary lead (best median window quality)
    where its window quality reaches ``min_lead_template_corr``, or another lead where it reaches
    that and the primary does not. Rejected beats keep their row (reason ``one_lead_only``).

    ``valid`` (one bool array per lead, per detection): detections in unusable stretches. They
    still form beats, but give no support; a beat with no valid support is not accepted and is
    marked ``unusable``. ``window_ok`` (one bool array per lead, per quality window of
    ``window_len`` samples): where a lead is unusable it is neither trusted nor counted in the
    majority, so the leads usable there decide.

    ``clean`` (per lead, per window: graded good by the noise tests) and ``energy`` (per lead,
    per sample: QRS energy over the local reference, from the detector) judge a minority beat
    from the signal, whatever its shape: a lead that is clean where it saw the beat with at
    least a typical beat's QRS energy (confidence >= 1) also trusts it, and a beat is refused when a lead that is clean there and did not see it holds
    no QRS energy at all at that time (below ``searchback_threshold``, the least the detector
    ever takes for a beat): a real heartbeat shows in every lead, if weakly; an artifact in one
    lead does not.
    """
    n_leads = len(peaks)
    if n_leads == 0 or sum(p.size for p in peaks) == 0:
        z = np.zeros(0, np.int64)
        return Fused(z, np.zeros((0, n_leads), bool), np.zeros(0), np.zeros(0, bool), z)
    q = np.vstack(quality)  # (n_leads, n_windows)
    primary = _primary(quality)
    tol = int(round(cfg.fuse_window_ms * fs / 1000))
    order = [primary] + [j for j in range(n_leads) if j != primary]
    # clusters: anchored on the primary lead, the others matched to the nearest anchor in tol
    pos_all = np.concatenate([peaks[j] for j in order])
    lead_all = np.concatenate([np.full(peaks[j].size, j) for j in order])
    conf_all = np.concatenate([conf[j] for j in order])
    valid_all = (np.concatenate([valid[j] for j in order]) if valid is not None
                 else np.ones(pos_all.size, bool))
    srt = np.argsort(pos_all, kind="stable")
    pos_s, lead_s, conf_s = pos_all[srt], lead_all[srt], conf_all[srt]
    valid_s = valid_all[srt]
    new = np.r_[True, np.diff(pos_s) > tol]
    cid = np.cumsum(new) - 1
    # a cluster that holds two detections of one lead is split at the gap between them
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
    conf_m = np.zeros((n_c, n_leads))  # each lead's detector confidence for each beat
    np.maximum.at(conf_m, (cid, lead_s), conf_s)
    # the R of a cluster: from the primary lead if it saw the beat, else the first lead in order
    rank = np.empty(n_leads, np.int64)
    rank[order] = np.arange(n_leads)
    key = rank[lead_s]
    pick = np.lexsort((key, cid))
    first = pick[np.r_[True, cid[pick][1:] != cid[pick][:-1]]]
    r = pos_s[first]
    r_lead = lead_s[first]
    n_sup = support.sum(1)
    win = np.clip((r / (window_s * fs)).astype(np.int64), 0, q.shape[1] - 1)
    qw = np.nan_to_num(q[:, win].T, nan=-1.0)  # (n_c, n_leads)
    good = qw >= cfg.min_lead_template_corr
    n_here = np.full(n_c, n_leads)
    if window_ok is not None and window_len:
        ok_m = np.column_stack([w[np.clip(r // window_len, 0, w.size - 1)] for w in window_ok])
        good &= ok_m
        n_here = np.maximum(ok_m.sum(axis=1), 1)
    trusted = np.zeros_like(good)
    trusted[:, primary] = good[:, primary]
    others = [j for j in range(n_leads) if j != primary]
    if others:
        trusted[:, others] = good[:, others] & ~good[:, [primary]]
    minority_ok = (support & trusted).any(1)
    contradicted = np.zeros(n_c, bool)
    clean_strong = np.zeros(n_c, bool)
    unsure = n_sup < n_here  # a minority beat
    if clean is not None and energy is not None and window_len:
        cl = np.column_stack([c[np.clip(r // window_len, 0, c.size - 1)] for c in clean])
        if window_ok is not None:
            cl &= ok_m
        e = np.column_stack([en[np.clip(r, 0, en.size - 1)] for en in energy])
        contradicted = (cl & ~seen & (e < cfg.searchback_threshold)).any(1)
        clean_strong = (support & cl & (conf_m >= 1.0)).any(1)
        unsure = unsure | ~(support & cl).any(1)  # or no lead that saw it is clean there
        # trust in a lead's template quality alone holds only where no other usable lead is
        # clean there (it then cannot confirm); next to a clean lead that did not see it, a
        # beat must be clean and strong where it was seen
        other_clean = (cl & ~seen).any(1)
        minority_ok = (((support & trusted).any(1) & ~other_clean) | clean_strong) & ~contradicted
    accepted = ((2 * n_sup > n_here) | minority_ok) & (n_sup > 0)
    # two accepted beats closer than the refractory period are one beat seen at two places
    # (leads disagree on where R is): keep the better supported one, then the primary's
    dist = int(round(cfg.refractory_ms * fs / 1000))
    for _ in range(3):
        ai = np.flatnonzero(accepted)
        close = np.flatnonzero(np.diff(r[ai]) < dist)
        if close.size == 0:
            break
        a_, b_ = ai[close], ai[close + 1]
        wa = n_sup[a_] * 2 + support[a_, primary]
        wb = n_sup[b_] * 2 + support[b_, primary]
        drop = np.where(wa > wb, b_, np.where(wb > wa, a_, np.where(best[a_] >= best[b_], b_, a_)))
        accepted[drop] = False
    between = between_beats(r, accepted, unsure & ~clean_strong)
    accepted &= ~between
    return Fused(r.astype(np.int64), seen, best, accepted, r_lead.astype(np.int64),
                 unusable=n_sup == 0, between=between)


def between_beats(r: np.ndarray, accepted: np.ndarray, minority: np.ndarray) -> np.ndarray:
    """Accepted minority detections that sit inside one cardiac cycle of their neighbours.

    A detection that not every usable lead saw, whose two accepted neighbours are no further
    apart than ``_PRUNE_RR`` x the local median RR (the detector's own pruning rule), adds a
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
        med = _running_median(rr, 9)
        span = r[ai[2:]] - r[ai[:-2]]
        hit = np.flatnonzero(minority[ai[1:-1]] & (span < _PRUNE_RR * med[1:])) + 1
        hit = hit[np.r_[True, np.diff(hit) > 1]] if hit.size else hit
        if hit.size == 0:
            break
        out[ai[hit]] = True
    return out


@dataclass
class LeadDetections:
    """One lead's detections: refined R, confidence, the 5-20 Hz band and window quality."""

    lead: int
    r: np.ndarray
    conf: np.ndarray
    band: np.ndarray
    quality: np.ndarray
    polarity: int
    energy: np.ndarray | None = None  # QRS energy near each sample over the local reference


def detect_leads(x: np.ndarray, fs: float, usable: np.ndarray, cfg: RpeaksConfig = RpeaksConfig()
                 ) -> list[LeadDetections]:
    """Detect and refine beats in every usable lead of ``x`` (n_leads, n_samples)."""
    x = as_signal(x, fs, "detect_leads", min_samples=8)
    out = []
    dist = max(1, int(round(cfg.refractory_ms * fs / 1000)))
    for j in np.flatnonzero(usable):
        p, c, band, energy = _detect(x[j], fs, cfg)
        r, pol = refine_r(x[j], p, fs, cfg.refine_window_ms)
        # refinement can bring two peaks together; keep the more confident one
        keep = _sparse_refractory(r, c + 1e-9, dist)
        sel = np.isin(r, keep)
        r, c = r[sel], c[sel]
        _, first = np.unique(r, return_index=True)
        r, c = r[first], c[first]
        out.append(LeadDetections(int(j), r, c, band, window_template_quality(band, r, fs), pol,
                                  energy))
    return out


def fuse_leads(dets: list[LeadDetections], n_leads: int, fs: float,
               cfg: RpeaksConfig = RpeaksConfig(), names: list[str] | None = None,
               valid: list[np.ndarray] | None = None, window_ok: list[np.ndarray] | None = None,
               window_len: int | None = None, clean: list[np.ndarray] | None = None):
    """Fuse :func:`detect_leads` results; returns (:class:`Fused` over all leads, StageLog).

    ``clean`` (one bool array per detection set, per window): see :func:`fuse`."""
    names = names or [str(j) for j in range(n_leads)]
    idx = np.array([d.lead for d in dets], dtype=np.int64)
    log = StageLog("rpeaks", params={k: getattr(cfg, k) for k in cfg.__dataclass_fields__})
    for d in dets:
        log.counts[f"detections_{names[d.lead]}"] = int(d.r.size)
    fused = fuse([d.r for d in dets], [d.conf for d in dets], [d.quality for d in dets], fs, cfg,
                 valid=valid, window_ok=window_ok, window_len=window_len, clean=clean,
                 energy=None if clean is None else [d.energy for d in dets])
    full = np.zeros((fused.r.size, n_leads), bool)
    if idx.size:
        full[:, idx] = fused.support
    lead_of = idx[fused.r_lead] if fused.r.size else fused.r_lead
    unusable = fused.unusable if fused.unusable is not None else np.zeros(fused.r.size, bool)
    fused = Fused(fused.r, full, fused.confidence, fused.accepted, lead_of, unusable,
                  fused.between if fused.between is not None else np.zeros(fused.r.size, bool))
    primary = _primary([d.quality for d in dets])
    log.derived["polarity"] = {names[d.lead]: d.polarity for d in dets}
    log.derived["primary_lead"] = names[int(idx[primary])] if idx.size else None
    log.derived["lead_quality_median"] = {
        names[d.lead]: (None if not np.isfinite(d.quality).any() else
                        round(float(np.nanmedian(d.quality)), 4)) for d in dets}
    log.counts.update(fused=int(fused.r.size), accepted=int(fused.accepted.sum()),
                      only_in_unusable=int(unusable.sum()),
                      between_beats=int(fused.between.sum()),
                      one_lead_only=int((~fused.accepted & ~unusable & ~fused.between).sum()))
    return fused, log


def detect_beats(x: np.ndarray, fs: float, usable: np.ndarray, cfg: RpeaksConfig = RpeaksConfig(),
                 names: list[str] | None = None):
    """Detect, refine and fuse beats over the usable leads of a filtered record.

    ``x``: (n_leads, n_samples) filtered signal; ``usable``: bool per lead; ``names``: lead names
    for the log (default: indices). Returns (:class:`Fused` with support over all leads, StageLog).
    """
    x = as_signal(x, fs, "detect_beats", min_samples=8)
    return fuse_leads(detect_leads(x, fs, usable, cfg), x.shape[0], fs, cfg, names)
