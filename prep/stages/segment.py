"""Segmentation stage: a window around each R, with exclusions for edges and gaps."""
from __future__ import annotations

import numpy as np

from prep.config import SegmentConfig
from prep.model import StageLog


def beat_windows(r: np.ndarray, fs: float, n_samples: int, gap: np.ndarray | None,
                 cfg: SegmentConfig = SegmentConfig()):
    """Window [start, end) around each R (native samples) and the reasons that exclude beats.

    Parameters
    ----------
    r : int array, sorted R positions.
    gap : bool array (n_samples,) or None; True where any used lead is missing.

    Returns
    -------
    start, end : int arrays
    reasons : list of lists of codes (``off_edge``, ``in_gap``, ``no_rr``)
    log : StageLog

    >>> s, e, why, _ = beat_windows(np.array([10, 500, 995]), 1000.0, 1000, None)
    >>> why
    [['off_edge'], [], ['off_edge']]
    """
    r = np.asarray(r, dtype=np.int64)
    log = StageLog("segment", params={k: getattr(cfg, k) for k in cfg.__dataclass_fields__})
    reasons: list[list[str]] = [[] for _ in range(r.size)]
    if cfg.mode == "fixed":
        before = np.full(r.size, int(round(cfg.before_ms * fs / 1000)))
        after = np.full(r.size, int(round(cfg.after_ms * fs / 1000)))
        log.derived.update(before_samples=int(before[0]) if r.size else None,
                           after_samples=int(after[0]) if r.size else None)
    else:
        rr_prev = np.r_[-1, np.diff(r)]
        rr_next = np.r_[np.diff(r), -1]
        before = np.round(cfg.before_rr * np.where(rr_prev > 0, rr_prev, 0)).astype(np.int64)
        after = np.round(cfg.after_rr * np.where(rr_next > 0, rr_next, 0)).astype(np.int64)
        for i in np.flatnonzero((rr_prev <= 0) | (rr_next <= 0)):
            reasons[i].append("no_rr")
    start, end = r - before, r + after
    for i in np.flatnonzero((start < 0) | (end > n_samples)):
        reasons[i].append("off_edge")
    if gap is not None and gap.any():
        csum = np.r_[0, np.cumsum(gap)]
        s, e = np.clip(start, 0, n_samples), np.clip(end, 0, n_samples)
        for i in np.flatnonzero(csum[e] - csum[s] > 0):
            reasons[i].append("in_gap")
    log.counts.update(beats=int(r.size), off_edge=sum("off_edge" in x for x in reasons),
                      in_gap=sum("in_gap" in x for x in reasons))
    return start, end, reasons, log
