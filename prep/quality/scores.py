"""Noise scoring, first version: lead faults (flat, clipped) and per-beat scores.

Per beat: correlation with the running median beat (``template_corr``), high-frequency residual
over amplitude (``hf_ratio``) and the fraction of flat or clipped samples in the window
(``bad_fraction``). Thresholds are in :class:`prep.config.QualityConfig`.
"""
from __future__ import annotations

import numpy as np
from scipy import signal

from prep.config import QualityConfig


def _runs(mask: np.ndarray, min_len: int) -> np.ndarray:
    """Keep only True runs of at least ``min_len`` samples (1-D)."""
    if mask.size == 0 or min_len <= 1:
        return mask.copy()
    d = np.diff(np.r_[0, mask.astype(np.int8), 0])
    starts, ends = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    long = (ends - starts) >= min_len
    out = np.zeros(mask.size + 1, np.int32)
    np.add.at(out, starts[long], 1)
    np.add.at(out, ends[long], -1)
    return np.cumsum(out[:-1]) > 0


def flat_mask(x: np.ndarray, fs: float, flat_ms: float) -> np.ndarray:
    """True on runs of identical consecutive samples lasting at least ``flat_ms`` (1-D lead).

    >>> x = np.r_[np.sin(np.arange(100.0)), np.zeros(100), np.sin(np.arange(1.0, 101.0))]
    >>> int(flat_mask(x, 100.0, 500).sum())
    100
    """
    same = np.r_[False, np.diff(x) == 0]
    same[:-1] |= same[1:]  # the first sample of a run belongs to it
    return _runs(same, max(2, int(round(flat_ms * fs / 1000))))


def clip_mask(x: np.ndarray, run: int) -> np.ndarray:
    """True on runs of at least ``run`` samples sitting at the lead's maximum or minimum value."""
    if x.size == 0:
        return np.zeros(0, bool)
    hi, lo = np.max(x), np.min(x)
    if hi == lo:
        return np.zeros(x.size, bool)  # a constant lead is flat, not clipped
    return _runs(x >= hi, run) | _runs(x <= lo, run)


def lead_faults(raw: np.ndarray, fs: float, cfg: QualityConfig, gap: np.ndarray):
    """Per-lead fault masks and summary. ``raw``: (n_leads, n_samples), gaps already filled.

    Returns ``bad`` (n_leads, n_samples) True where flat, clipped or missing, the separate masks
    per lead (``{"flat", "clipped", "missing"}``), and one dict per lead with the fractions.
    """
    bad = np.zeros(raw.shape, bool)
    summary, masks = [], []
    for j in range(raw.shape[0]):
        gj = gap[j]
        fl = flat_mask(np.where(gj, np.nan, raw[j]), fs, cfg.flat_ms) & ~gj
        cl = clip_mask(raw[j][~gj], cfg.clip_run_samples) if (~gj).any() else np.zeros(0, bool)
        clipped = np.zeros(raw.shape[1], bool)
        clipped[~gj] = cl
        clipped &= ~fl
        bad[j] = fl | clipped | gj
        masks.append({"flat": fl, "clipped": clipped, "missing": gj})
        summary.append({"flat_fraction": float(fl.mean()), "clipped_fraction": float(clipped.mean()),
                        "missing_fraction": float(gj.mean()),
                        "usable_fraction": float(1 - bad[j].mean())})
    return bad, masks, summary


def window_fraction(mask: np.ndarray, start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """Fraction of each window [start, end) that is True, for every lead: (n_beats, n_leads)."""
    csum = np.concatenate([np.zeros((mask.shape[0], 1)), np.cumsum(mask, axis=1)], axis=1)
    s, e = np.clip(start, 0, mask.shape[1]), np.clip(end, 0, mask.shape[1])
    return ((csum[:, e] - csum[:, s]) / np.maximum(e - s, 1)).T


def high_freq(x: np.ndarray, fs: float) -> tuple[np.ndarray, float]:
    """The part of ``x`` above min(40 Hz, 0.4 x fs): muscle noise and residual spikes."""
    cut = min(40.0, 0.4 * fs)
    sos = signal.butter(4, cut, "highpass", fs=fs, output="sos")
    return signal.sosfiltfilt(sos, x, axis=-1, padlen=min(x.shape[-1] - 1, int(fs))), cut


def hf_ratio(hf: np.ndarray, beats_mv: np.ndarray, start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """RMS of the high-frequency part in each window over the beat's peak-to-peak: (n_beats, n_leads)."""
    sq = hf * hf
    ms = window_fraction(sq, start, end)  # mean of squares
    ptp = beats_mv.max(axis=2) - beats_mv.min(axis=2)
    return np.sqrt(ms) / np.maximum(ptp, 1e-6)


def template_corr(beats: np.ndarray, n_template: int, stride: int = 8) -> np.ndarray:
    """Correlation of each beat with the median of the ``n_template`` beats around it.

    ``beats``: (n_beats, n_leads, n_samples); computed on at most 64 points per beat (the beats are
    already low-passed). The running template is recomputed every ``stride`` beats (it moves
    slowly; this keeps the cost low). Returns (n_beats, n_leads).
    """
    n, n_l, n_s = beats.shape
    if n == 0:
        return np.zeros((0, n_l))
    step = max(1, n_s // 64)
    sub = beats[:, :, ::step]
    peak = np.abs(sub).max(axis=-1, keepdims=True)
    # correlation is scale-free: scaling each beat to 1 keeps float32 products from overflowing
    b = np.ascontiguousarray(sub / np.where(peak > 0, peak, 1.0), dtype=np.float32)
    w = min(n_template, n)
    out = np.empty((n, n_l))
    first = np.clip(np.arange(n) - w // 2, 0, n - w)  # first beat of each beat's template window
    first = (first // stride) * stride
    anchors = np.unique(first)
    tpls = np.stack([np.median(b[a:a + w], axis=0) for a in anchors])  # one per anchor
    which = np.searchsorted(anchors, first)
    for a in range(0, n, 4096):
        i = np.arange(a, min(n, a + 4096))
        tpl = tpls[which[i]]
        x = b[i] - b[i].mean(-1, keepdims=True)
        t = tpl - tpl.mean(-1, keepdims=True)
        num = (x * t).sum(-1)
        den = np.sqrt((x * x).sum(-1) * (t * t).sum(-1))
        out[i] = np.where(den > 1e-12, num / np.maximum(den, 1e-12), 0.0)
    return out


def qrs_match(y: np.ndarray, r: np.ndarray, usable: np.ndarray, library: np.ndarray, fs: float,
              half_ms: float, k: int, max_library: int) -> np.ndarray:
    """How well each beat's QRS, all usable leads together, matches the record's clean beats.

    ``y``: filtered signal (n_leads, n); ``r``: R samples of the beats to score; ``usable``:
    (n_beats, n_leads) leads to compare for each beat; ``library``: R samples of reference beats
    (beats in good windows). Each beat's segment R +- ``half_ms`` on its usable leads is joined
    into one vector (mean removed per lead, so the leads' relative amplitudes and polarities,
    the heart's electrical axis, count), and correlated with the same leads of every library
    beat (at most ``max_library``, evenly spread). The score is the ``k``-th best correlation
    (a beat's match with itself excluded), so a beat must look like ``k`` clean beats of its own
    record; a shape that occurs only a few times in clean stretches scores lower.
    Returns (n_beats,) in [-1, 1]; NaN where fewer than ``k + 1`` library beats exist.
    """
    n_b = r.size
    out = np.full(n_b, np.nan)
    if library.size > max_library:
        library = library[np.linspace(0, library.size - 1, max_library).round().astype(int)]
    if n_b == 0 or library.size < k + 1:
        return out
    h = max(1, int(round(half_ms * fs / 1000)))
    off = np.arange(-h, h + 1)
    n = y.shape[1]

    def segments(at):  # (n_at, n_leads, 2h+1), mean removed per lead
        s = y[:, np.clip(at[:, None] + off[None, :], 0, n - 1)].transpose(1, 0, 2)
        return s - s.mean(axis=2, keepdims=True)

    lib = segments(library).astype(np.float32)
    self_of = np.searchsorted(library, r)
    self_of = np.where((self_of < library.size) &
                       (library[np.minimum(self_of, library.size - 1)] == r), self_of, -1)
    patterns, which = np.unique(usable, axis=0, return_inverse=True)
    which = np.asarray(which).ravel()
    for p_i, pat in enumerate(patterns):  # one step per pattern of usable leads (few)
        if not pat.any():
            continue
        rows = np.flatnonzero(which == p_i)
        L = lib[:, pat].reshape(library.size, -1)
        L = L / np.maximum(np.linalg.norm(L, axis=1, keepdims=True), 1e-9)
        for a in range(0, rows.size, 2048):
            i = rows[a:a + 2048]
            B = segments(r[i])[:, pat].reshape(i.size, -1).astype(np.float32)
            B = B / np.maximum(np.linalg.norm(B, axis=1, keepdims=True), 1e-9)
            C = B @ L.T
            own = self_of[i] >= 0
            C[np.flatnonzero(own), self_of[i][own]] = -np.inf
            out[i] = np.partition(C, C.shape[1] - k, axis=1)[:, C.shape[1] - k]
    return out
