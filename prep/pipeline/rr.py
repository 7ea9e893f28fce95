"""RR intervals of every row, counted between heartbeats only, and unknown (NaN) across a
detection that could not be confirmed."""
from __future__ import annotations

import numpy as np


def rr_to_beats(r: np.ndarray, accepted: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """RR of every row to the previous and next of the beats ``accepted`` (sorted R samples),
    in s (NaN where there is none)."""
    k = np.searchsorted(accepted, r, side="left")
    prev = np.where(k > 0, accepted[np.clip(k - 1, 0, None)], -1) if accepted.size else np.full(r.size, -1)
    k2 = np.searchsorted(accepted, r, side="right")
    nxt = (np.where(k2 < accepted.size, accepted[np.clip(k2, 0, accepted.size - 1)], -1)
           if accepted.size else np.full(r.size, -1))
    rp = np.where(prev >= 0, (r - prev) / fs, np.nan)
    rn = np.where(nxt >= 0, (nxt - r) / fs, np.nan)
    return rp, rn


#: reasons of detections that are not counted as heartbeats for want of confirmation (rather
#: than contradicted by the signal): an RR across one of them is unknown
UNCONFIRMED = ("weak_in_noise", "unmatched_in_noise", "detector_disagreement", "unusable_window")


def unknown_across(r, unsure, rr_prev, rr_next, fs):
    """RR intervals set to NaN where an unconfirmed detection lies strictly inside them.

    >>> unknown_across(np.array([0, 100, 200]), np.array([150]), np.array([np.nan, 1., 1.]),
    ...                 np.array([1., 1., np.nan]), 100.0)
    (array([nan,  1., nan]), array([ 1., nan, nan]))
    """
    if unsure.size == 0:
        return rr_prev, rr_next
    u = np.sort(unsure)
    prev = r - np.nan_to_num(rr_prev) * fs
    nxt = r + np.nan_to_num(rr_next) * fs
    across_p = np.searchsorted(u, r, "left") > np.searchsorted(u, prev, "right")
    across_n = np.searchsorted(u, nxt, "left") > np.searchsorted(u, r, "right")
    return np.where(across_p, np.nan, rr_prev), np.where(across_n, np.nan, rr_next)
