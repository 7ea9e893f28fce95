"""The shared array helpers return exactly what the numpy call they replace returns."""
import warnings

import numpy as np
import pytest

from prep.arrays import group_medians, kth_largest, nan_median_rows, sorted_median


@pytest.mark.parametrize("n", [1, 2, 3, 30, 31])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_sorted_median_is_numpy_median(n, dtype):
    # numpy (the registry library) is the reference: np.median(a, axis=-1), NaN rows included
    rng = np.random.default_rng(n)
    for a in (rng.normal(size=(40, 3, n)).astype(dtype),
              np.round(rng.normal(size=(40, n)) * 2).astype(dtype)):  # ties
        a.flat[::17] = np.nan
        got, ref = sorted_median(a), np.median(a, axis=-1)
        assert got.dtype == ref.dtype
        np.testing.assert_array_equal(got, ref)


def test_group_medians_are_numpy_medians_per_group():
    # np.median over each group's slice is the reference (the per-window loop it replaced)
    rng = np.random.default_rng(3)
    v = rng.exponential(size=500)
    g = np.sort(rng.integers(0, 60, 500))
    _, first = np.unique(g, return_index=True)
    ref = np.array([np.median(s) for s in np.split(v, first[1:])])
    np.testing.assert_array_equal(group_medians(v, g), ref)


@pytest.mark.parametrize("k", [1, 2, 3, 8, 9, 40])
def test_kth_largest_is_numpy_partition(k):
    # numpy (the registry library) is the reference: np.partition(c, n - k, axis=1)[:, n - k],
    # with ties, -inf (a beat's match with itself) and NaN in the rows
    rng = np.random.default_rng(k)
    c = np.round(rng.normal(size=(300, 50)) * 4).astype(np.float32)
    c[np.arange(300), rng.integers(0, 50, 300)] = -np.inf
    c[::37, 3] = np.nan
    ref = np.partition(c, 50 - k, axis=1)[:, 50 - k]
    np.testing.assert_array_equal(kth_largest(c.copy(), k), ref)
    with pytest.raises(ValueError, match="k must be"):
        kth_largest(c.copy(), 51)


def test_nan_median_rows_is_numpy_nanmedian():
    # numpy (the registry library) is the reference: np.nanmedian(w, axis=1), rows of 1-7
    # values with NaN anywhere, ties, and rows of NaN only (NaN, as nanmedian gives)
    rng = np.random.default_rng(11)
    for n in range(1, 8):
        w = np.round(rng.normal(size=(400, n)) * 3, 1)
        w[rng.random((400, n)) < 0.3] = np.nan
        w[0] = np.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # "All-NaN slice"
            ref = np.nanmedian(w, axis=1)
        assert np.isnan(ref).any()
        np.testing.assert_array_equal(nan_median_rows(w), ref)
    assert nan_median_rows(np.zeros((3, 0))).shape == (3,)
