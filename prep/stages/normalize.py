"""Normalization stage: per beat, per record or per dataset statistics, stored for inversion.

``normalized = (beat - center) / scale``; ``center`` and ``scale`` have one value per beat and
lead, so ``beat = normalized * scale + center`` inverts it exactly.
"""
from __future__ import annotations

import numpy as np

_TINY = 1e-6  # mV; a flat (zero-filled or constant) beat keeps scale 1 rather than dividing by 0


def statistics(beats: np.ndarray, method: str, axis) -> tuple[np.ndarray, np.ndarray]:
    """Center and scale of ``beats`` over ``axis`` for ``method`` (keepdims)."""
    if method == "zscore":
        c, s = beats.mean(axis=axis, keepdims=True), beats.std(axis=axis, keepdims=True)
    elif method == "minmax":
        c = beats.min(axis=axis, keepdims=True)
        s = beats.max(axis=axis, keepdims=True) - c
    elif method == "robust":
        q1, c, q3 = np.percentile(beats, [25, 50, 75], axis=axis, keepdims=True)
        s = q3 - q1
    elif method == "none":
        c = np.zeros(beats.shape[:2] + (1,))
        s = np.ones(beats.shape[:2] + (1,))
    else:
        raise ValueError(f"normalize: method must be zscore, minmax, robust or none; got {method!r}")
    s = np.where(s > _TINY, s, 1.0)
    return c, s


def fit_per_lead(beats: np.ndarray, mask: np.ndarray, method: str) -> tuple[np.ndarray, np.ndarray]:
    """Per-lead center and scale over all given beats (unmasked ones only): two (n_leads,) arrays."""
    n_l = beats.shape[1]
    c, s = np.zeros(n_l), np.ones(n_l)
    for j in range(n_l):
        sel = mask[:, j]
        if sel.any():
            cj, sj = statistics(beats[sel, j][:, None, :], method, axis=(0, 2))
            c[j], s[j] = cj.ravel()[0], sj.ravel()[0]
    return c, s


def apply_stats(beats: np.ndarray, mask: np.ndarray, c: np.ndarray, s: np.ndarray):
    """Normalize with given statistics, (n_beats, n_leads) or broadcastable; masked leads stay 0."""
    c = np.where(mask, np.broadcast_to(c, mask.shape), 0.0)
    s = np.where(mask, np.broadcast_to(s, mask.shape), 1.0)
    y = (beats - c[..., None]) / s[..., None]
    y[~mask] = 0.0
    return y, c, s


def normalize(beats: np.ndarray, mask: np.ndarray, method: str, scope: str):
    """Normalize ``beats`` (n_beats, n_leads, n_samples); statistics use only unmasked leads.

    ``scope`` 'beat' uses each beat and lead; 'record' and 'dataset' use all beats given (the
    caller passes one record's beats, or the whole dataset's) per lead. Masked (missing) leads get
    center 0 and scale 1 and stay zero.

    Returns normalized beats, center (n_beats, n_leads) and scale (n_beats, n_leads).

    >>> b = np.arange(12.0).reshape(1, 2, 6)
    >>> y, c, s = normalize(b, np.ones((1, 2), bool), "zscore", "beat")
    >>> np.allclose(y * s[..., None] + c[..., None], b)
    True
    """
    n_b, n_l, _ = beats.shape
    if n_b == 0:
        return beats.copy(), np.zeros((0, n_l)), np.ones((0, n_l))
    if scope == "beat":
        c, s = statistics(beats, method, axis=2)
        return apply_stats(beats, mask, c[..., 0], s[..., 0])
    c, s = fit_per_lead(beats, mask, method)
    return apply_stats(beats, mask, c[None, :], s[None, :])
