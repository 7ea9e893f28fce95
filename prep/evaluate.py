"""Beat-detection scoring in the style of ANSI/AAMI EC57: one-to-one matching within a window."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Score:
    tp: int
    fn: int
    fp: int

    @property
    def sensitivity(self) -> float:
        return self.tp / (self.tp + self.fn) if self.tp + self.fn else float("nan")

    @property
    def ppv(self) -> float:
        return self.tp / (self.tp + self.fp) if self.tp + self.fp else float("nan")

    def __add__(self, other: "Score") -> "Score":
        return Score(self.tp + other.tp, self.fn + other.fn, self.fp + other.fp)


def match_beats(detected, reference, fs: float, window_ms: float = 150.0) -> Score:
    """Match detections to reference beats one to one, each within ``window_ms``.

    Walks both sorted lists once, pairing each reference beat with the earliest unmatched
    detection in its window, which gives the largest possible number of matches for windows of
    equal width (EC57 uses a 150 ms matching window).

    >>> match_beats([100, 400, 900], [102, 395, 600], 1000.0).__dict__
    {'tp': 2, 'fn': 1, 'fp': 1}
    """
    d = np.sort(np.asarray(detected, dtype=np.int64))
    r = np.sort(np.asarray(reference, dtype=np.int64))
    tol = window_ms * fs / 1000
    i = j = tp = 0
    while i < d.size and j < r.size:  # evaluation only; linear in the number of beats
        if d[i] < r[j] - tol:
            i += 1           # a detection no reference beat can take: false positive
        elif d[i] > r[j] + tol:
            j += 1           # a reference beat with no detection left: missed
        else:
            tp += 1          # the earliest compatible pair: optimal for equal windows
            i += 1
            j += 1
    return Score(tp, int(r.size - tp), int(d.size - tp))


def match_pairs(detected, reference, fs: float, window_ms: float = 150.0
                ) -> tuple[np.ndarray, np.ndarray]:
    """The pairs :func:`match_beats` counts: for each detection the index of its reference beat
    (-1 when unmatched), and for each reference beat the index of its detection (-1 when missed).

    Inputs must be sorted; indices refer to the inputs as given.

    >>> d2r, r2d = match_pairs([100, 400, 900], [102, 395, 600], 1000.0)
    >>> d2r.tolist(), r2d.tolist()
    ([0, 1, -1], [0, 1, -1])
    """
    d = np.asarray(detected, dtype=np.int64)
    r = np.asarray(reference, dtype=np.int64)
    tol = window_ms * fs / 1000
    d2r = np.full(d.size, -1, np.int64)
    r2d = np.full(r.size, -1, np.int64)
    i = j = 0
    while i < d.size and j < r.size:  # the same walk as match_beats
        if d[i] < r[j] - tol:
            i += 1
        elif d[i] > r[j] + tol:
            j += 1
        else:
            d2r[i], r2d[j] = j, i
            i += 1
            j += 1
    return d2r, r2d
