"""Per-beat scores: correlation with the running median beat (``template_corr``), the
high-frequency residual over amplitude (``hf_ratio``), the QRS match against the record's clean
beats (``qrs_match``), amplitude outliers and agreement with the second detector. Thresholds
are in :class:`prep.config.QualityConfig`; the rules that read them: :mod:`prep.quality.rules`.
"""
from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy import signal

from prep.arrays import kth_largest, nan_median_rows, sorted_median
from prep.quality.faults import window_fraction


@lru_cache(maxsize=64)
def _highpass(cut: float, fs: float) -> np.ndarray:
    return signal.butter(4, cut, "highpass", fs=fs, output="sos")


def high_freq(x: np.ndarray, fs: float) -> tuple[np.ndarray, float]:
    """The part of ``x`` above min(40 Hz, 0.4 x fs): muscle noise and residual spikes."""
    cut = min(40.0, 0.4 * fs)
    sos = _highpass(float(cut), float(fs))
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
    # one template per anchor, all at once: a (anchors, leads, points, w) view, median over w
    # (in blocks of anchors, so a day-long record does not hold every window at once)
    win = np.lib.stride_tricks.sliding_window_view(b, w, axis=0)
    tpls = np.concatenate([sorted_median(win[anchors[s:s + 128]])
                           for s in range(0, anchors.size, 128)])
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
            out[i] = kth_largest(C, k)
    return out


def masked_median(v: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Median over the leads a beat keeps, (n_beats, n_leads) -> (n_beats,); NaN with none.

    >>> masked_median(np.array([[1.0, 3.0], [2.0, 9.0]]), np.array([[True, True], [True, False]]))
    array([2., 2.])
    """
    return nan_median_rows(np.where(mask, v, np.nan))


def detector_agreement(r: np.ndarray, other: dict[int, np.ndarray], usable: np.ndarray,
                       fs: float, tol_s: float = 0.15) -> np.ndarray:
    """True where the second detector found a beat within ``tol_s`` of R in a usable lead.

    ``other``: lead index -> the second detector's sorted R samples in that lead.

    >>> detector_agreement(np.array([100, 300]), {0: np.array([105, 900])}, np.array([True]),
    ...                    1000.0)
    array([ True, False])
    """
    tol = tol_s * fs
    agree = np.zeros(r.size, bool)
    for j, p in other.items():
        if usable[j] and p.size:
            k = np.clip(np.searchsorted(p, r), 1, p.size - 1) if p.size > 1 else np.zeros(r.size, int)
            d = np.minimum(np.abs(p[np.maximum(k - 1, 0)] - r), np.abs(p[k] - r))
            agree |= d <= tol
    return agree


def cut_beat_scores(beats_mv: np.ndarray, mask: np.ndarray, hf: np.ndarray, bad: np.ndarray,
                    start: np.ndarray, end: np.ndarray, n_template: int) -> dict[str, np.ndarray]:
    """The scores of the cut beats, each over the leads the beat keeps.

    ``beats_mv`` (n, n_axis, n_samples) with masked leads zeroed; ``mask`` (n, n_axis);
    ``hf``: the high-frequency part of the axis leads (:func:`high_freq`); ``bad``: their
    flat/clipped/missing masks; ``start``/``end``: the beats' windows. Returns
    ``template_corr``, ``hf_ratio`` (medians over kept leads), ``bad_fraction`` (the worst kept
    lead) and ``amplitude_z`` (robust z-score of the log peak-to-peak amplitude in the record,
    MAD floored at 0.1; NaN with fewer than three beats).
    """
    any_lead = mask.any(axis=1)
    badf = window_fraction(bad, start, end)
    out = {"template_corr": masked_median(template_corr(beats_mv, n_template), mask),
           "hf_ratio": masked_median(hf_ratio(hf, beats_mv, start, end), mask),
           "bad_fraction": np.where(any_lead, np.max(np.where(mask, badf, 0.0), axis=1), np.nan),
           "amplitude_z": np.full(mask.shape[0], np.nan)}
    ptp = beats_mv.max(axis=2) - beats_mv.min(axis=2)
    la = np.log(np.maximum(masked_median(ptp, mask), 1e-6))
    ok = np.isfinite(la)
    if ok.sum() >= 3:
        med = np.median(la[ok])
        mad = 1.4826 * np.median(np.abs(la[ok] - med))
        out["amplitude_z"] = np.abs(la - med) / max(mad, 0.1)
    return out
