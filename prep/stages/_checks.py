"""Input checks shared by the stages (one message style)."""
from __future__ import annotations

import numpy as np

from prep.errors import StageInputError


def as_signal(x, fs: float, caller: str, *, min_samples: int = 1) -> np.ndarray:
    """Validate a (..., n_samples) float array and a positive rate; returns a float64 view/copy."""
    if not np.isfinite(fs) or fs <= 0:
        raise StageInputError(f"{caller}: fs must be a positive finite rate in Hz. Got {fs!r}.")
    a = np.asarray(x, dtype=np.float64)
    if a.ndim == 0:
        raise StageInputError(f"{caller}: input must be an array of samples, got a scalar.")
    if a.shape[-1] < min_samples:
        raise StageInputError(f"{caller}: input has {a.shape[-1]} samples; at least {min_samples} "
                              f"are needed ({min_samples / fs:.3g} s at {fs:g} Hz).")
    if not np.all(np.isfinite(a)):
        raise StageInputError(f"{caller}: input contains NaN or infinite values; the orchestrator "
                              "turns those into gaps before stages run.")
    return a
