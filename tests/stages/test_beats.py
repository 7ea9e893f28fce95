"""Segmentation, resampling, normalization, labels and noise scores."""
import numpy as np
import pytest
from scipy import signal

from prep.config import SegmentConfig
from prep.model import Annotations
from prep.quality.faults import clip_mask, flat_mask
from prep.quality.scores import template_corr
from prep.stages.labels import attach_labels
from prep.stages.normalize import normalize
from prep.stages.resample import cut_and_resample
from prep.stages.segment import beat_windows


def test_fixed_windows_and_edge_and_gap_exclusion():
    gap = np.zeros(10000, bool)
    gap[5000:5010] = True
    s, e, why, log = beat_windows(np.array([30, 2000, 5050, 9950]), 250.0, 10000, gap,
                                  SegmentConfig())
    assert (e - s).tolist() == [162] * 4  # 250 ms + 400 ms at 250 Hz
    assert why == [["off_edge"], [], ["in_gap"], ["off_edge"]]


def test_rr_windows():
    s, e, why, _ = beat_windows(np.array([100, 300, 550]), 100.0, 1000, None,
                                SegmentConfig(mode="rr", before_rr=0.5, after_rr=0.5))
    assert why[0] == ["no_rr"] and why[2] == ["no_rr"]
    assert (s[1], e[1]) == (200, 425)


def test_resample_matches_scipy_resample_poly_reference():
    # reference: scipy.signal.resample_poly on each beat on its own
    rng = np.random.default_rng(0)
    x = rng.standard_normal((2, 3000))
    start = np.array([100, 900, 2000])
    out, log = cut_and_resample(x, start, start + 234, 256, 360.0)
    for k, s in enumerate(start):
        ref = signal.resample_poly(x[:, s:s + 234], 128, 117, axis=-1, padtype="line")
        np.testing.assert_allclose(out[k], ref, atol=1e-12)
    assert log.derived["up"] == 128 and log.derived["down"] == 117


def test_resample_keeps_a_band_limited_sine():
    fs = 500.0
    t = np.arange(5000) / fs
    x = np.sin(2 * np.pi * 5 * t)[None]
    out, _ = cut_and_resample(x, np.array([1000]), np.array([1500]), 100, fs)  # 1 s -> 100 Hz
    tt = 2.0 + np.arange(100) / 100
    inner = slice(10, 90)
    np.testing.assert_allclose(out[0, 0, inner], np.sin(2 * np.pi * 5 * tt)[inner], atol=0.01)


def test_rr_mode_resampling_varying_lengths():
    x = np.sin(np.linspace(0, 30, 4000))[None]
    out, log = cut_and_resample(x, np.array([100, 1000]), np.array([300, 1400]), 64, 250.0)
    assert out.shape == (2, 1, 64) and log.derived["method"] == "lowpass+linear"


@pytest.mark.parametrize("method", ["zscore", "minmax", "robust", "none"])
@pytest.mark.parametrize("scope", ["beat", "record", "dataset"])
def test_normalization_inverts_exactly_and_ignores_masked_leads(method, scope):
    rng = np.random.default_rng(1)
    b = rng.standard_normal((5, 3, 32)) * 2 + 1
    mask = np.ones((5, 3), bool)
    mask[:, 2] = False
    b[:, 2] = 0.0
    y, c, s = normalize(b, mask, method, scope)
    np.testing.assert_allclose(y * s[..., None] + c[..., None], b, atol=1e-12)
    assert np.all(y[:, 2] == 0)
    if method == "zscore" and scope == "beat":
        np.testing.assert_allclose(y[:, :2].mean(-1), 0, atol=1e-12)
        np.testing.assert_allclose(y[:, :2].std(-1), 1, atol=1e-12)


def test_labels_nearest_within_window_only_beat_symbols():
    a = Annotations(np.array([100, 150, 400, 700]), np.array(["N", "+", "V", "~"], dtype=object))
    lab = attach_labels(np.array([98, 160, 400, 700, 1000]), a, 1000.0, 150.0)
    assert lab.tolist() == ["N", "N", "V", "", ""]  # "+" and "~" are not beats


def test_flat_and_clip_masks():
    x = np.r_[np.sin(np.arange(500) / 5.0) * 0.5, np.full(100, 0.2), np.sin(np.arange(500) / 5.0)]
    x = np.clip(x, -0.9, 0.9)
    fl = flat_mask(x, 250.0, 100)
    assert fl[500:600].all() and not fl[:500].any()
    cl = clip_mask(x, 3)
    assert cl[600:].any() and not cl[:600].any()


def test_template_corr_flags_the_odd_beat():
    t = np.linspace(-1, 1, 64)
    normal = np.exp(-(t / 0.1) ** 2)
    beats = np.repeat(normal[None, None], 40, axis=0) + 0.01 * np.random.default_rng(2).standard_normal((40, 1, 64))
    beats[20, 0] = -normal  # an inverted (ectopic) beat
    c = template_corr(beats, 31)
    assert c[20, 0] < 0 and np.delete(c[:, 0], 20).min() > 0.95
