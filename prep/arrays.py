"""Small array helpers shared by the stages and the quality package (core: imports numpy only).

Each returns exactly the values of the numpy call it replaces (tests/test_arrays.py checks them
against those references), only faster on many short rows or groups.
"""
from __future__ import annotations

import numpy as np


def sorted_median(a: np.ndarray) -> np.ndarray:
    """``np.median(a, axis=-1)`` with the same values, by one sort (np.median partitions at
    several points and checks for NaN: about six times slower on many short rows).

    >>> sorted_median(np.array([[3.0, 1.0, 2.0], [4.0, np.nan, 1.0]]))
    array([ 2., nan])
    >>> sorted_median(np.array([[1.0, 4.0], [2.0, 2.0]], dtype=np.float32))
    array([2.5, 2. ], dtype=float32)
    """
    n = a.shape[-1]
    if n == 0:
        return np.median(a, axis=-1)
    s = np.sort(a, axis=-1)  # NaN sorts last: a row holding one has NaN as its last value
    mid = s[..., n // 2] if n % 2 else (s[..., n // 2 - 1] + s[..., n // 2]) / 2
    return np.where(np.isnan(s[..., -1]), s[..., -1], mid)


def group_medians(v: np.ndarray, group: np.ndarray) -> np.ndarray:
    """Median of ``v`` within each value of the sorted ``group`` (in group order), as pandas'
    ``groupby(...).median()`` and ``np.median`` per group compute it (the middle value, or the
    mean of the two middle ones), for all groups at once. ``v`` holds no NaN.

    >>> group_medians(np.array([5.0, 1.0, 3.0, 2.0, 4.0]), np.array([0, 0, 0, 1, 1]))
    array([3., 3.])
    """
    order = np.lexsort((v, group))
    s = v[order]
    _, first, size = np.unique(group[order], return_index=True, return_counts=True)
    lo = s[first + (size - 1) // 2]
    hi = s[first + size // 2]
    return np.where(size % 2 == 1, lo, (lo + hi) / 2)


def kth_largest(c: np.ndarray, k: int) -> np.ndarray:
    """The ``k``-th largest value of each row of the 2-D ``c`` (ties counted, NaN largest), as
    ``np.partition(c, n - k, axis=1)[:, n - k]``; by ``k - 1`` rounds of argmax for small ``k``
    (about ten times faster on a thousand columns). ``c`` is overwritten.

    >>> kth_largest(np.array([[1.0, 5.0, 5.0, 2.0], [0.0, 3.0, 1.0, 2.0]]), 2)
    array([5., 2.])
    """
    n = c.shape[1]
    if not 1 <= k <= n:
        raise ValueError(f"kth_largest: k must be in 1..{n}; got {k}")
    if k > 8:
        return np.partition(c, n - k, axis=1)[:, n - k]
    rows = np.arange(c.shape[0])
    for _ in range(k - 1):
        c[rows, c.argmax(axis=1)] = -np.inf
    return c.max(axis=1)


def nan_median_rows(w: np.ndarray) -> np.ndarray:
    """``np.nanmedian(w, axis=1)`` of a 2-D array with the same values (NaN where a row holds
    only NaN, without the warning), by one sort: NaN sorts last, so the middle of each row's
    values that are not NaN sits at a known place.

    >>> nan_median_rows(np.array([[1.0, np.nan, 3.0], [np.nan, np.nan, np.nan], [4.0, 2.0, 9.0]]))
    array([ 2., nan,  4.])
    """
    if w.shape[1] == 0:
        return np.full(w.shape[0], np.nan)
    s = np.sort(w, axis=1)
    k = (~np.isnan(w)).sum(axis=1)
    rows = np.arange(w.shape[0])
    lo, hi = s[rows, np.maximum((k - 1) // 2, 0)], s[rows, k // 2]  # k // 2 < n always
    return np.where(k == 0, np.nan, np.where(k % 2 == 1, lo, (lo + hi) / 2))
