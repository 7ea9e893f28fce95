"""Band-pass stage: zero-phase Butterworth in second-order sections.

The configured edges are where the *delivered* (forward-backward) response is 3 dB down. Each
single pass is therefore designed with its corner moved so that its own loss there is 1.5 dB.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

from prep.config import BandpassConfig
from prep.model import StageLog
from prep.stages._checks import as_signal
from prep.stages._design import butter_sos, warped_corner


@dataclass(frozen=True)
class BandpassDesign:
    low_hz: float
    high_hz: float
    order: int
    fs: float
    sos: np.ndarray
    single_pass_low_hz: float
    single_pass_high_hz: float
    adapted: str = ""

    @property
    def padlen(self) -> int:
        """Padding used by sosfiltfilt: about three periods of the lower edge, in samples."""
        return int(round(3 * self.fs / self.low_hz))

    def describe(self) -> dict:
        return {"type": "Butterworth high-pass + low-pass, second-order sections, zero-phase "
                        "(scipy.signal.sosfiltfilt)",
                "order_per_edge": self.order, "delivered_minus3db_hz": [self.low_hz, self.high_hz],
                "single_pass_corner_hz": [round(self.single_pass_low_hz, 6),
                                          round(self.single_pass_high_hz, 6)],
                "padlen_samples": self.padlen, "padlen_s": round(self.padlen / self.fs, 3),
                "adapted": self.adapted}


def design_bandpass(fs: float, low_hz: float, high_hz: float, order: int = 2) -> BandpassDesign:
    """Design the band-pass; the upper edge is lowered to 0.45 x fs when Nyquist is too low.

    >>> d = design_bandpass(360.0, 0.67, 40.0, 2)
    >>> from scipy.signal import sosfreqz
    >>> w, h = sosfreqz(d.sos, worN=[0.67, 40.0], fs=360.0)
    >>> [round(float(20 * np.log10(abs(v) ** 2)), 2) for v in h]  # delivered = |H|^2
    [-3.0, -3.0]
    """
    adapted = ""
    if high_hz >= 0.45 * fs:
        adapted = (f"upper edge {high_hz:g} Hz lowered to {0.45 * fs:.4g} Hz: the record's Nyquist "
                   f"({fs / 2:g} Hz) is too close")
        high_hz = 0.45 * fs
    if high_hz <= low_hz:
        raise ValueError(f"band-pass edges must satisfy low_hz < high_hz < Nyquist (fs={fs:g}); "
                         f"got low_hz={low_hz:g}, high_hz={high_hz:g}")
    hp, lp = warped_corner(low_hz, fs, order, up=True), warped_corner(high_hz, fs, order, up=False)
    sos = np.concatenate([butter_sos(order, hp, "highpass", fs),
                          butter_sos(order, lp, "lowpass", fs)])
    return BandpassDesign(float(low_hz), float(high_hz), int(order), float(fs), sos, hp, lp, adapted)


def bandpass(x, fs: float, cfg: BandpassConfig = BandpassConfig()):
    """Apply the zero-phase band-pass to ``x`` (..., n_samples). Returns (y, StageLog)."""
    x = as_signal(x, fs, "bandpass", min_samples=2)
    log = StageLog("bandpass", params={"enabled": cfg.enabled, "low_hz": cfg.low_hz,
                                       "high_hz": cfg.high_hz, "order": cfg.order})
    if not cfg.enabled:
        return x.copy(), log
    d = design_bandpass(fs, cfg.low_hz, cfg.high_hz, cfg.order)
    log.derived["design"] = d.describe()
    if d.adapted:
        log.warnings.append(d.adapted)
    padlen = min(d.padlen, x.shape[-1] - 1)
    if padlen < d.padlen:
        log.warnings.append(f"signal ({x.shape[-1]} samples) is shorter than the filter's padding "
                            f"({d.padlen} samples); edges are less reliable")
    y = signal.sosfiltfilt(d.sos, x, axis=-1, padlen=padlen)
    return y, log
