"""Signal helpers of the orchestrator: gaps filled before stages run, and the second detector
(neurokit2's peak finder) the quality indices compare ours with."""
from __future__ import annotations

import numpy as np


def fill_gaps(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Replace NaN/inf runs by linear interpolation per lead; returns (filled, gap mask)."""
    gap = ~np.isfinite(x)
    if not gap.any():
        return x, gap
    y = x.copy()
    idx = np.arange(x.shape[1])
    for j in np.flatnonzero(gap.any(axis=1)):
        ok = ~gap[j]
        y[j] = np.interp(idx, idx[ok], x[j, ok]) if ok.any() else 0.0
    return y, gap


def second_detector(x: np.ndarray, fs: float) -> np.ndarray:
    """R peaks from neurokit2's own detector on the filtered lead (for bSQI and agreement)."""
    import warnings

    import neurokit2 as nk

    # the lead is already band-limited to 40 Hz, so keeping every q-th sample down to >= 90 Hz
    # does not alias it; the peer detector then runs q times faster (R within +-q samples)
    q = max(1, int(fs // 90))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            p = nk.ecg_findpeaks(x[::q], sampling_rate=int(round(fs / q)),
                                 method="neurokit")["ECG_R_Peaks"]
        return np.sort(np.asarray(p, dtype=np.int64) * q)
    except Exception:  # a failing peer detector means no agreement, recorded as such
        return np.zeros(0, np.int64)
