"""One contract over every array stage: clear errors on bad input, no mutation, determinism."""
import numpy as np
import pytest

from prep.errors import StageInputError
from prep.stages.bandpass import bandpass
from prep.stages.baseline import remove_baseline
from prep.stages.powerline import remove_powerline
from prep.stages.rpeaks import detect_beats

FS = 250.0


def _sig(n_leads=2, n=5000, seed=0):
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    x = np.zeros((n_leads, n))
    x[:, ::200] = 1.0
    x = np.apply_along_axis(lambda v: np.convolve(v, np.hanning(13), "same"), 1, x)
    return x + 0.01 * rng.standard_normal(x.shape) + 0.1 * np.sin(2 * np.pi * 50 * t)


STAGES = {
    "powerline": lambda x, fs: remove_powerline(x, fs)[0],
    "bandpass": lambda x, fs: bandpass(x, fs)[0],
    "baseline": lambda x, fs: remove_baseline(x, fs)[0],
    "rpeaks": lambda x, fs: detect_beats(x, fs, np.ones(x.shape[0], bool))[0].r,
}


@pytest.mark.parametrize("name", STAGES)
def test_rejects_nan_with_a_clear_message(name):
    x = _sig()
    x[0, 100] = np.nan
    with pytest.raises(StageInputError, match="NaN or infinite"):
        STAGES[name](x, FS)


@pytest.mark.parametrize("name", STAGES)
def test_rejects_bad_rate(name):
    with pytest.raises(StageInputError, match="fs must be a positive"):
        STAGES[name](_sig(), 0.0)


@pytest.mark.parametrize("name", STAGES)
def test_does_not_mutate_and_is_deterministic(name):
    x = _sig()
    before = x.copy()
    a = STAGES[name](x, FS)
    b = STAGES[name](x, FS)
    np.testing.assert_array_equal(x, before)
    np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("name", ["powerline", "bandpass", "baseline"])
def test_filters_keep_shape(name):
    for shape in [(5000,), (1, 5000), (3, 5000)]:
        x = _sig(n_leads=3)[: shape[0] if len(shape) == 2 else 1].reshape(shape)
        assert STAGES[name](x, FS).shape == shape
