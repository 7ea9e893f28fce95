"""Lead faults on the raw signal: flat (lead-off), clipped and missing samples, per lead and
per beat window. Thresholds are in :class:`prep.config.QualityConfig`.
"""
from __future__ import annotations

import numpy as np

from prep.config import QualityConfig


def _runs(mask: np.ndarray, min_len: int) -> np.ndarray:
    """Keep only True runs of at least ``min_len`` samples (1-D)."""
    if mask.size == 0 or min_len <= 1:
        return mask.copy()
    d = np.diff(np.r_[0, mask.astype(np.int8), 0])
    starts, ends = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    long = (ends - starts) >= min_len
    out = np.zeros(mask.size + 1, np.int32)
    out[starts[long]] += 1  # starts are distinct, and so are ends: no index repeats
    out[ends[long]] -= 1
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


def _row_runs(mask: np.ndarray, min_len: int) -> np.ndarray:
    """:func:`_runs` on every row of a 2-D mask at once: the rows are laid end to end with one
    False between them, so no run crosses from one row into the next."""
    if mask.shape[-1] == 0 or min_len <= 1:
        return mask.copy()
    padded = np.zeros((mask.shape[0], mask.shape[1] + 1), bool)
    padded[:, :-1] = mask
    return _runs(padded.ravel(), min_len).reshape(padded.shape)[:, :-1]


def lead_faults(raw: np.ndarray, fs: float, cfg: QualityConfig, gap: np.ndarray):
    """Per-lead fault masks and summary. ``raw``: (n_leads, n_samples), gaps already filled.

    Returns ``bad`` (n_leads, n_samples) True where flat, clipped or missing, the separate masks
    per lead (``{"flat", "clipped", "missing"}``), and one dict per lead with the fractions.
    Leads without missing samples are done together, as 2-D arrays (the same masks as
    :func:`flat_mask` and :func:`clip_mask` lead by lead: tests/quality/test_quality.py).
    """
    n_leads, n = raw.shape
    gap = np.asarray(gap, bool)
    flat = np.zeros(raw.shape, bool)
    clipped = np.zeros(raw.shape, bool)
    if n:
        x = np.where(gap, np.nan, raw)
        same = np.zeros(raw.shape, bool)
        same[:, 1:] = np.diff(x, axis=1) == 0
        same[:, :-1] |= same[:, 1:]  # the first sample of a run belongs to it
        flat = _row_runs(same, max(2, int(round(cfg.flat_ms * fs / 1000)))) & ~gap
        whole = ~gap.any(axis=1)  # leads with no missing sample: clipping judged on all at once
        if whole.any():
            w = raw[whole]
            hi, lo = w.max(axis=1, keepdims=True), w.min(axis=1, keepdims=True)
            run = cfg.clip_run_samples
            c = _row_runs(w >= hi, run) | _row_runs(w <= lo, run)
            c[(hi == lo)[:, 0]] = False  # a constant lead is flat, not clipped
            clipped[whole] = c
        for j in np.flatnonzero(~whole):  # clipping judged on the recorded samples only
            gj = gap[j]
            if (~gj).any():
                clipped[j, ~gj] = clip_mask(raw[j][~gj], cfg.clip_run_samples)
    clipped &= ~flat
    bad = flat | clipped | gap
    masks = [{"flat": flat[j], "clipped": clipped[j], "missing": gap[j]} for j in range(n_leads)]
    summary = [{"flat_fraction": float(flat[j].mean()), "clipped_fraction": float(clipped[j].mean()),
                "missing_fraction": float(gap[j].mean()),
                "usable_fraction": float(1 - bad[j].mean())} for j in range(n_leads)]
    return bad, masks, summary


def window_fraction(mask: np.ndarray, start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """Fraction of each window [start, end) that is True, for every lead: (n_beats, n_leads)."""
    csum = np.concatenate([np.zeros((mask.shape[0], 1)), np.cumsum(mask, axis=1)], axis=1)
    s, e = np.clip(start, 0, mask.shape[1]), np.clip(end, 0, mask.shape[1])
    return ((csum[:, e] - csum[:, s]) / np.maximum(e - s, 1)).T


def fault_reason(f: dict) -> str:
    """Why a lead is rejected for its faults, from one :func:`lead_faults` summary.

    >>> fault_reason({"flat_fraction": 0.7, "clipped_fraction": 0.0, "missing_fraction": 0.0,
    ...               "usable_fraction": 0.3})
    'only 30% usable; mostly flat (lead-off) (70%)'
    """
    parts = [(f["flat_fraction"], "flat (lead-off)"), (f["clipped_fraction"], "clipped"),
             (f["missing_fraction"], "missing samples")]
    share, what = max(parts)
    return f"only {f['usable_fraction']:.0%} usable; mostly {what} ({share:.0%})"


def usable_of_recorded(fault: dict) -> float:
    """Share of a lead's recorded (not missing) samples that are neither flat nor clipped.

    >>> usable_of_recorded({"usable_fraction": 0.09, "missing_fraction": 0.9})
    0.9
    """
    present = 1.0 - fault["missing_fraction"]
    return round(fault["usable_fraction"] / present, 12) if present > 0 else 0.0


def copied_leads(x: np.ndarray) -> list[tuple[int, int]]:
    """(j, k) for every lead k that holds exactly the samples of an earlier lead j.

    >>> copied_leads(np.array([[1.0, 2.0], [1.0, 2.0], [1.0, 3.0]]))
    [(0, 1)]
    """
    out, taken = [], set()
    # only leads alike at 256 spread samples can be copies; only those are compared in full
    # (NaN is read as -inf in the probe: a prefilter, the full comparison decides)
    probe = x[:, np.linspace(0, x.shape[1] - 1, min(256, x.shape[1])).astype(np.int64)]
    probe = np.where(np.isnan(probe), -np.inf, probe)
    alike = (probe[:, None, :] == probe[None, :, :]).all(axis=-1)
    for k in range(1, x.shape[0]):
        for j in range(k):
            if (alike[j, k] and j not in taken
                    and np.array_equal(x[j], x[k], equal_nan=True)):
                out.append((j, k))
                taken.add(k)
                break
    return out
