"""Powerline stage: detect the mains frequency from the spectrum and notch it and its harmonics."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

from prep.config import PowerlineConfig
from prep.model import StageLog
from prep.stages._checks import as_signal

_MAX_SEGMENTS = 64  # spectrum segments used on long records (enough for a stable estimate)


def line_peak_db(x: np.ndarray, fs: float, freqs: list[float]) -> dict[float, float]:
    """How far each frequency's spectral peak stands above its neighbourhood, in dB.

    Welch spectrum (4 s Hann segments, at most 64 evenly spaced ones, averaged over leads); peak = max power within +-0.5 Hz,
    neighbourhood = median power 2 to 5 Hz away on both sides. Frequencies at or above
    0.95 x Nyquist get -inf.

    >>> fs = 250.0; t = np.arange(int(60 * fs)) / fs
    >>> x = np.random.default_rng(0).normal(0, 0.05, t.size) + 0.2 * np.sin(2 * np.pi * 50 * t)
    >>> line_peak_db(x, fs, [50.0])[50.0] > 20
    True
    """
    x = np.atleast_2d(x)
    nper = int(min(x.shape[-1], round(4 * fs)))
    n_seg = x.shape[-1] // nper
    if n_seg > _MAX_SEGMENTS:  # long record: average evenly spaced 4 s segments (same estimate)
        starts = np.linspace(0, x.shape[-1] - nper, _MAX_SEGMENTS).astype(np.int64)
        seg = x[:, starts[:, None] + np.arange(nper)]
        seg = signal.detrend(seg, axis=-1, type="constant") * signal.get_window("hann", nper)
        p = (np.abs(np.fft.rfft(seg, axis=-1)) ** 2).mean(axis=(0, 1))
        f = np.fft.rfftfreq(nper, 1 / fs)
    else:
        f, p = signal.welch(x, fs=fs, nperseg=nper, axis=-1)
        p = p.mean(axis=0)
    out = {}
    for f0 in freqs:
        if f0 >= 0.95 * fs / 2:
            out[f0] = float("-inf")
            continue
        peak = p[(f >= f0 - 0.5) & (f <= f0 + 0.5)]
        near = p[((f >= f0 - 5) & (f <= f0 - 2)) | ((f >= f0 + 2) & (f <= f0 + 5) & (f < fs / 2))]
        if peak.size == 0 or near.size == 0:
            out[f0] = float("-inf")
            continue
        out[f0] = float(10 * np.log10(max(peak.max(), 1e-30) / max(np.median(near), 1e-30)))
    return out


@dataclass(frozen=True)
class NotchDesign:
    """Notches at ``freqs_hz`` as second-order sections, applied forward and backward."""

    freqs_hz: tuple[float, ...]
    quality_factor: float
    sos: np.ndarray

    def describe(self) -> dict:
        return {"type": "IIR notch (scipy.signal.iirnotch), zero-phase (sosfiltfilt)",
                "freqs_hz": list(self.freqs_hz), "quality_factor": self.quality_factor,
                "bandwidth_hz": [round(f / self.quality_factor, 4) for f in self.freqs_hz],
                "n_sections": int(self.sos.shape[0])}


def design_notches(mains_hz: float, fs: float, quality_factor: float, harmonics: bool) -> NotchDesign:
    """Notch design for the mains frequency and (optionally) its harmonics below 0.95 x Nyquist."""
    freqs = []
    k = 1
    while k * mains_hz < 0.95 * fs / 2:
        freqs.append(k * mains_hz)
        if not harmonics:
            break
        k += 1
    sos = [signal.tf2sos(*signal.iirnotch(f0, quality_factor, fs=fs)) for f0 in freqs]
    sos_arr = np.concatenate(sos) if sos else np.zeros((0, 6))
    return NotchDesign(tuple(float(f) for f in freqs), float(quality_factor), sos_arr)


def remove_powerline(x, fs: float, cfg: PowerlineConfig = PowerlineConfig()):
    """Detect mains (50/60 Hz) and notch it. ``x``: (..., n_samples) in mV.

    Returns the filtered signal and a :class:`StageLog` with the detected frequency (or None when
    no candidate stands out by ``min_peak_db``), the notch design, and the line peak in dB before
    and after (the residual).
    """
    x = as_signal(x, fs, "remove_powerline", min_samples=2)
    log = StageLog("powerline", params={"enabled": cfg.enabled,
                                        "candidates_hz": list(cfg.candidates_hz),
                                        "min_peak_db": cfg.min_peak_db,
                                        "quality_factor": cfg.quality_factor,
                                        "harmonics": cfg.harmonics})
    if not cfg.enabled:
        log.derived["mains_hz"] = None
        return x.copy(), log
    before = line_peak_db(x, fs, list(cfg.candidates_hz))
    best = max(before, key=lambda f: before[f])
    log.derived["line_peak_db_before"] = {str(k): _r(v) for k, v in before.items()}
    if before[best] < cfg.min_peak_db:
        log.derived["mains_hz"] = None
        log.derived["note"] = "no mains peak stands out; no notch applied"
        return x.copy(), log
    design = design_notches(best, fs, cfg.quality_factor, cfg.harmonics)
    padlen = min(x.shape[-1] - 1, 3 * int(round(fs)))
    y = signal.sosfiltfilt(design.sos, x, axis=-1, padlen=padlen)
    after = line_peak_db(y, fs, [best])
    log.derived.update({"mains_hz": best, "design": design.describe(),
                        "line_peak_db_after": _r(after[best])})
    return y, log


def _r(v: float) -> float | None:
    return None if not np.isfinite(v) else round(float(v), 3)
