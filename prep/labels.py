"""Reference labels: the beat annotation nearest each R within a window."""
from __future__ import annotations

import numpy as np

from .model import Annotations
from .read import BEAT_SYMBOLS


def attach_labels(r: np.ndarray, ann: Annotations | None, fs: float, window_ms: float) -> np.ndarray:
    """Symbol of the nearest beat annotation within ``window_ms`` of each R ('' when none).

    >>> from prep.model import Annotations
    >>> a = Annotations(np.array([100, 400]), np.array(["N", "V"], dtype=object))
    >>> attach_labels(np.array([110, 260, 395]), a, 1000.0, 100).tolist()
    ['N', '', 'V']
    """
    out = np.full(r.size, "", dtype=object)
    if ann is None or r.size == 0:
        return out
    is_beat = np.array([s in BEAT_SYMBOLS for s in ann.symbol], bool)
    samp, sym = ann.sample[is_beat], ann.symbol[is_beat]
    if samp.size == 0:
        return out
    order = np.argsort(samp, kind="stable")
    samp, sym = samp[order], sym[order]
    k = np.searchsorted(samp, r)
    lo, hi = np.clip(k - 1, 0, samp.size - 1), np.clip(k, 0, samp.size - 1)
    near = np.where(np.abs(samp[lo] - r) <= np.abs(samp[hi] - r), lo, hi)
    ok = np.abs(samp[near] - r) <= window_ms * fs / 1000
    out[ok] = sym[near[ok]]
    return out
