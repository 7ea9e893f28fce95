"""The second detector is our own code; neurokit2 (the registry package whose
``ecg_findpeaks(method="neurokit")`` it follows) is the reference it must equal exactly."""
import warnings

import numpy as np
import pytest

from prep.io.wfdb import read_wfdb
from prep.pipeline.signals import gradient_peaks, second_detector
from prep.stages.bandpass import bandpass

from ..conftest import ref_path

nk = pytest.importorskip("neurokit2")


def _peer(x, fs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(nk.ecg_findpeaks(x, sampling_rate=fs, method="neurokit")["ECG_R_Peaks"],
                          dtype=np.int64)


@pytest.mark.parametrize("fs,hr,noise", [(90, 60, 0.0), (125, 90, 0.05), (250, 150, 0.1),
                                         (500, 45, 0.2), (1000, 70, 0.02)])
def test_identical_to_neurokit2_on_simulations(fs, hr, noise):
    # neurokit2.ecg_simulate (McSharry et al. 2003 model) with its own additive noise
    x = nk.ecg_simulate(duration=60, sampling_rate=fs, heart_rate=hr, noise=noise, random_state=3)
    y = nk.ecg_clean(x, sampling_rate=fs)
    mine, theirs = gradient_peaks(y, fs), _peer(y, fs)
    assert theirs.size > 0.9 * 60 * hr / 60
    np.testing.assert_array_equal(mine, theirs)


@pytest.mark.refdata
@pytest.mark.parametrize("record", [("mitdb", "105"), ("mitdb", "119"), ("svdb", "800"),
                                    ("nstdb", "118e_6")])
def test_identical_to_neurokit2_on_records(record):
    # MIT-BIH records (PhysioNet), 105 and the -6 dB noise-stress record the hardest ones
    rec = read_wfdb(ref_path(*record))
    y, _ = bandpass(np.nan_to_num(rec.signals), rec.fs)
    q = max(1, int(rec.fs // 90))
    for lead in y:
        theirs = _peer(lead[::q], int(round(rec.fs / q))) * q
        np.testing.assert_array_equal(second_detector(lead, rec.fs), theirs)


def test_degenerate_inputs_give_no_peak():
    assert gradient_peaks(np.zeros(1000), 250).size == 0      # flat: no QRS stretch
    assert gradient_peaks(np.ones(50), 250).size == 0         # shorter than the 0.75 s average
    x = np.zeros(5000)
    x[2500] = 1.0                                             # one spike: one peak
    np.testing.assert_array_equal(gradient_peaks(x, 250), _peer(x, 250))


def test_most_prominent_peak_per_stretch_is_scipys():
    # scipy.signal.find_peaks(prominence=...) per stretch is the reference (the registry
    # library); integer-valued walks make flat peaks and equal prominences on purpose
    from scipy import signal

    from prep.pipeline.signals import _most_prominent
    rng = np.random.default_rng(1)
    for trial in range(100):
        x = np.cumsum(rng.normal(size=2000))
        if trial % 2:
            x = np.round(x * (1 + trial % 5))
        starts = np.sort(rng.choice(1940, 40, replace=False))
        ends = starts + rng.integers(1, 60, 40)
        got = _most_prominent(x, starts, ends)
        for i, (b, e) in enumerate(zip(starts, ends)):
            t, p = signal.find_peaks(x[b:e], prominence=(None, None))
            assert got[i] == (b + t[np.argmax(p["prominences"])] if t.size else -1)
