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
from scipy import ndimage, signal

from prep.arrays import group_medians
from prep.config import RpeaksConfig
from prep.model import StageLog
from prep.stages._checks import as_signal
from prep.stages._design import butter_sos
from prep.stages._fusion import (PRUNE_RR, QUALITY_WINDOW_S, Fused, LeadEvidence, fuse,
                                 primary_lead, running_median, running_quantile)

_REF_CANDIDATES = 16      # candidates in the local reference (common practice, no source)
_REF_QUANTILE = 0.8       # reference = this quantile of candidate heights (tuned, docs/rpeaks.md)


def qrs_envelope(x: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """QRS energy envelope and the 5-20 Hz band signal of ``x`` (..., n_samples)."""
    high = min(20.0, 0.45 * fs)
    sos = butter_sos(3, [5.0, high], "bandpass", fs)
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


def _detect(x, fs: float, cfg: RpeaksConfig, envelope=None):
    """:func:`detect_lead`, also returning the QRS energy of every sample relative to the local
    reference (the envelope's maximum within ``fuse_window_ms`` over the reference height of the
    nearest candidate): 1 is a typical beat, ``searchback_threshold`` the least the detector
    ever takes for a beat. ``envelope``: the lead's (envelope, band, envelope maximum within
    ``fuse_window_ms``) when the caller computed them for several leads at once."""
    x = as_signal(x, fs, "detect_lead", min_samples=8)
    if x.ndim != 1:
        raise ValueError(f"detect_lead: one lead expected, got shape {x.shape}")
    env, band, near = (*qrs_envelope(x, fs), None) if envelope is None else envelope
    dist = max(1, int(round(cfg.refractory_ms * fs / 1000)))
    cand, _ = signal.find_peaks(env, distance=int(round(0.2 * fs)))
    if cand.size == 0 or np.max(env) <= 0:
        return np.zeros(0, np.int64), np.zeros(0), band, np.zeros(x.size)
    h = env[cand]
    ref = running_quantile(h, _REF_CANDIDATES, _REF_QUANTILE)
    ref = np.maximum(ref, 1e-12)
    acc = _sparse_refractory(cand[h > cfg.threshold * ref], env[cand[h > cfg.threshold * ref]], dist)
    for _ in range(2):  # search back, twice so gaps split by a find can be searched again
        if acc.size < 3:
            break
        rr = np.diff(acc)
        med = running_median(rr, 9)
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
        med = running_median(rr, 9)
        he = env[acc]
        weak = (he[1:-1] < he[:-2]) & (he[1:-1] < he[2:])
        bad = np.flatnonzero(weak & (rr[:-1] + rr[1:] < PRUNE_RR * med[1:])) + 1
        if bad.size == 0:
            break
        bad = bad[np.r_[True, np.diff(bad) > 1]]
        acc = np.delete(acc, bad)
    conf = env[acc] / ref[np.clip(np.searchsorted(cand, acc), 0, cand.size - 1)]
    if near is None:
        near = _near_max(env, fs, cfg)
    energy = near / np.interp(np.arange(x.size), cand, ref)
    return acc.astype(np.int64), conf, band, energy


def _near_max(env: np.ndarray, fs: float, cfg: RpeaksConfig) -> np.ndarray:
    """The envelope's maximum within +-``fuse_window_ms`` of each sample (..., n_samples)."""
    tol = max(1, int(round(cfg.fuse_window_ms * fs / 1000)))
    return ndimage.maximum_filter1d(env, 2 * tol + 1, axis=-1, mode="nearest")


def refine_r(x: np.ndarray, peaks: np.ndarray, fs: float, window_ms: float) -> tuple[np.ndarray, int]:
    """Move each peak to the QRS extremum within +-``window_ms`` in the filtered lead ``x``.

    The extremum follows the lead's polarity (+1 when the median positive peak of its beats is
    at least the median negative one, else -1; so inverted leads work), except in a beat whose
    opposite deflection is over 1.5 times larger (an ectopic beat of other polarity).
    """
    return refine_rows(x[None], [peaks], fs, window_ms)[0]


def refine_rows(x: np.ndarray, peaks: list[np.ndarray], fs: float, window_ms: float
                ) -> list[tuple[np.ndarray, int]]:
    """:func:`refine_r` of every row of ``x`` (n_leads, n) with its ``peaks``, all at once:
    (refined R, polarity) per row, the same as row by row (the polarity medians per lead by
    :func:`prep.arrays.group_medians`)."""
    half = int(round(window_ms * fs / 1000))
    sizes = [p.size for p in peaks]
    pol = np.ones(len(peaks), np.int64)
    if sum(sizes) == 0:
        return [(p.copy(), 1) for p in peaks]
    lead = np.repeat(np.arange(len(peaks)), sizes)
    at = np.concatenate(peaks)
    h = max(half, 1)
    idx = np.clip(at[:, None] + np.arange(-h, h + 1), 0, x.shape[-1] - 1)
    seg = x[lead[:, None], idx]
    up, down = seg.max(1), -seg.min(1)
    seen = np.unique(lead)
    pol[seen] = np.where(group_medians(up, lead) >= group_medians(down, lead), 1, -1)
    if half == 0:
        return [(p.copy(), int(q)) for p, q in zip(peaks, pol)]
    use_up = np.where(pol[lead] > 0, up >= down / 1.5, up > 1.5 * down)
    pos = np.where(use_up, seg.argmax(1), seg.argmin(1))
    r = np.split(idx[np.arange(at.size), pos].astype(np.int64), np.cumsum(sizes)[:-1])
    return [(ri, int(q)) for ri, q in zip(r, pol)]


def template_quality_rows(bands: np.ndarray, peaks: list[np.ndarray], fs: float,
                          window_s: float = QUALITY_WINDOW_S) -> list[np.ndarray]:
    """Median correlation of the beats in each window with their lead's QRS template (+-100
    ms), for every row of ``bands`` (n_leads, n: the 5-20 Hz band) with its ``peaks``.

    Per lead, one value per ``window_s`` window of the record (NaN where the window holds no
    beat, all NaN with fewer than three beats): the template-matching SQI of Orphanidou et al.
    (2015). All leads at once: each lead's template is the median of its own beats, taken from
    one sort of all leads' beats padded with NaN.
    """
    n = bands.shape[-1]
    n_win = max(int(np.ceil(n / (window_s * fs))), 1)
    out = [np.full(n_win, np.nan) for _ in peaks]
    h = int(round(0.1 * fs))
    ps = [p[(p >= h) & (p < n - h)] for p in peaks]
    rows = [i for i, p in enumerate(ps) if p.size >= 3]
    if not rows:
        return out
    cnt = np.array([ps[i].size for i in rows])
    off = np.arange(-h, h + 1)
    seg = np.full((len(rows), int(cnt.max()), off.size), np.nan)
    for a, i in enumerate(rows):
        s = bands[i][ps[i][:, None] + off]
        seg[a, :cnt[a]] = s - s.mean(1, keepdims=True)
    srt = np.sort(seg, axis=1)  # NaN padding sorts last: each lead's middle beats are known
    lo = srt[np.arange(len(rows)), (cnt - 1) // 2]
    hi = srt[np.arange(len(rows)), cnt // 2]
    tpl = np.where((cnt % 2 == 1)[:, None], lo, (lo + hi) / 2)
    tpl = tpl - tpl.mean(axis=1, keepdims=True)
    corr, group = [], []
    for a, i in enumerate(rows):
        sg, t = seg[a, :cnt[a]], tpl[a]
        corr.append((sg @ t) / np.sqrt((sg * sg).sum(1) * (t @ t) + 1e-30))
        group.append(a * n_win + (ps[i] / (window_s * fs)).astype(np.int64))
    group = np.concatenate(group)  # sorted: rows in order, windows in order within a row
    med = group_medians(np.concatenate(corr), group)
    g = np.unique(group)
    for a, i in enumerate(rows):
        mine = g // n_win == a
        out[i][g[mine] % n_win] = med[mine]
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
    dist = max(1, int(round(cfg.refractory_ms * fs / 1000)))
    leads = np.flatnonzero(usable)
    env, bands = qrs_envelope(x[leads], fs)  # one filter pass over all usable leads
    near = _near_max(env, fs, cfg)
    found = [_detect(x[j], fs, cfg, (env[i], bands[i], near[i])) for i, j in enumerate(leads)]
    refined = refine_rows(x[leads], [f[0] for f in found], fs, cfg.refine_window_ms)
    kept = []
    for (_, c, _, _), (r, _) in zip(found, refined):
        # refinement can bring two peaks together; keep the more confident one
        keep = _sparse_refractory(r, c + 1e-9, dist)
        sel = np.isin(r, keep)
        r, c = r[sel], c[sel]
        _, first = np.unique(r, return_index=True)
        kept.append((r[first], c[first]))
    quality = template_quality_rows(bands, [r for r, _ in kept], fs)  # all leads at once
    return [LeadDetections(int(j), r, c, band, q, pol, energy)
            for j, (r, c), (_, _, band, energy), (_, pol), q
            in zip(leads, kept, found, refined, quality)]


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
    evidence = [LeadEvidence(d.r, d.conf, d.quality,
                             valid=None if valid is None else valid[i],
                             window_ok=None if window_ok is None else window_ok[i],
                             clean=None if clean is None else clean[i],
                             energy=None if clean is None else d.energy)
                for i, d in enumerate(dets)]
    fused = fuse(evidence, fs, cfg, window_len=window_len)
    full = np.zeros((fused.r.size, n_leads), bool)
    if idx.size:
        full[:, idx] = fused.support
    lead_of = idx[fused.r_lead] if fused.r.size else fused.r_lead
    unusable = fused.unusable if fused.unusable is not None else np.zeros(fused.r.size, bool)
    fused = Fused(fused.r, full, fused.confidence, fused.accepted, lead_of, unusable,
                  fused.between if fused.between is not None else np.zeros(fused.r.size, bool))
    primary = primary_lead([d.quality for d in dets])
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
