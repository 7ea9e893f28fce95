"""Lead and window quality, beat reasons, and the audit commands."""
import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from typer.testing import CliRunner

from prep.cli.main import app
from prep.config import Config, WindowsConfig
from prep.read import read_wfdb
from prep.windows import lead_windows

from .conftest import DEMO, ref_path

TRUTH = json.loads((DEMO / "truth.json").read_text())
runner = CliRunner()


def _windows(out, rec):
    w = pd.read_parquet(out / "windows.parquet")
    return w[w.record == rec]


def test_ksqi_ssqi_match_scipy_stats():
    # reference: scipy.stats.kurtosis (Pearson) and skew on each full window
    rng = np.random.default_rng(0)
    fs = 250.0
    x = rng.standard_t(5, size=int(40 * fs))
    z = np.zeros(x.size, bool)
    w = lead_windows(x, x, {"flat": z, "clipped": z, "missing": z}, fs, np.zeros(0, int),
                     np.zeros(0, int), None, WindowsConfig())
    L = int(10 * fs)
    for k in range(4):
        seg = x[k * L:(k + 1) * L]
        assert w.ksqi[k] == pytest.approx(stats.kurtosis(seg, fisher=False), rel=1e-9)
        assert w.ssqi[k] == pytest.approx(stats.skew(seg), rel=1e-9, abs=1e-12)
    assert (w.grade == "unusable").all()  # noise without beats: bSQI/tSQI undefined


def test_demo_faults_found_in_the_right_windows(demo_run):
    out, _ = demo_run
    fs = 250
    # motion bursts at 40-48 s and 120-130 s: those windows, both leads, not good; others good
    w = _windows(out, "night05")
    burst = w.start.isin([40 * fs, 120 * fs])
    assert (w[burst].grade != "good").all()
    assert (w[~burst].grade == "good").mean() > 0.9
    # clipped stretches of II (30-50 s, 110-125 s): fault_fraction decides there, only there
    w = _windows(out, "night07")
    clip = w[(w.lead == "II") & w.start.isin([30 * fs, 40 * fs, 110 * fs, 120 * fs])]
    assert clip.decided_by.str.contains("fault_fraction").all()
    others = w[~w.index.isin(clip.index)]
    assert not others.decided_by.str.contains("fault_fraction").any()
    # lead-off V5 of night06: every window unusable, lead rejected as flat
    w = _windows(out, "night06")
    assert (w[w.lead == "V5"].grade == "unusable").all() and (w[w.lead == "II"].grade == "good").all()
    leads = pd.read_parquet(out / "leads.parquet").set_index(["record", "lead"])
    assert leads.loc[("night06", "V5"), "main_fault"] == "flat"
    # baseline wander of night03 is seen by basSQI; mains found by the powerline stage
    assert _windows(out, "night03").decided_by.str.contains("bassqi").mean() > 0.5
    m = json.loads((out / "manifest.json").read_text())
    mains = {r: [s for s in m["records"][r]["stages"] if s["stage"] == "powerline"][0]["derived"]
             ["mains_hz"] for r in ("night01", "night03", "night04")}
    assert mains == {"night01": None, "night03": 50.0, "night04": 60.0}
    # the clean record: every window good, no lead rejected anywhere but night06 V5
    assert (_windows(out, "night01").grade == "good").all()
    assert leads.drop(("night06", "V5")).used.all()


@pytest.mark.refdata
@pytest.mark.parametrize("rec,min_agree", [("118e06", 0.85), ("118e00", 0.9), ("118e_6", 0.9)])
def test_nstdb_grades_follow_the_known_noise_timing(rec, min_agree):
    # MIT-BIH Noise Stress Test Database: noise from minute 5 in alternating 2-minute stretches
    # (database documentation); at 6 dB and below the grades should follow that timing
    from prep.bench import _noise_mask
    from prep.pipeline import process_record
    r = read_wfdb(ref_path("nstdb", rec))
    w = process_record(r, Config(), r.leads).windows
    truth = _noise_mask(r.n_samples, r.fs)[w.start.to_numpy()]
    agree = ((w.grade != "good").to_numpy() == truth).mean()
    assert agree >= min_agree, agree


@pytest.mark.refdata
def test_nstdb_24db_clean_stretches_stay_good():
    from prep.bench import _noise_mask
    from prep.pipeline import process_record
    r = read_wfdb(ref_path("nstdb", "118e24"))
    w = process_record(r, Config(), r.leads).windows
    clean = ~_noise_mask(r.n_samples, r.fs)[w.start.to_numpy()]
    assert (w.grade[clean] == "good").mean() >= 0.85  # measured 87.7 %
    assert (w.grade != "unusable").all()


def test_why_prints_reasons_and_draws(demo_run, tmp_path):
    out, _ = demo_run
    t = pd.read_parquet(out / "beats.parquet")
    bid = t[t.reasons.str.contains("high_freq_noise")].beat_id.iloc[0]
    png = tmp_path / "why.png"
    r = runner.invoke(app, ["why", str(out), bid, "--plot", str(png)])
    assert r.exit_code == 0, r.output
    assert "high_freq_noise" in r.output and "threshold quality.max_hf_ratio = 0.1" in r.output
    assert "window    II:" in r.output
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 10000
    assert runner.invoke(app, ["why", str(out), "nope:1"]).exit_code == 2


def test_leads_survey_gates_with_require():
    r = runner.invoke(app, ["leads", str(DEMO), "--require", "usable>=0.9"])
    assert r.exit_code == 1 and "night06 V5: usable 0.00 is not >= 0.9" in r.output
    r = runner.invoke(app, ["leads", str(DEMO / "night01.hea"), "--require", "II:good>=0.9"])
    assert r.exit_code == 0, r.output
    r = runner.invoke(app, ["leads", str(DEMO), "--require", "usable=>1"])
    assert r.exit_code == 2 and "MEASURE OP VALUE" in r.output


def test_ectopic_beats_survive_quality(demo_run):
    out, _ = demo_run
    t = pd.read_parquet(out / "beats.parquet")
    v = t[t.label == "V"]
    assert v.included.all() and v["flags"].str.contains("unlike_neighbours").all()
