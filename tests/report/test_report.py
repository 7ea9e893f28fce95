"""The HTML report: self-contained, complete, and rendered by a real headless browser."""
import re
import shutil
import subprocess

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from prep.cli.main import app
from prep.dataset.check import check_dataset

CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update",
                  "--disable-sync"]


@pytest.fixture(scope="module")
def report(demo_run, tmp_path_factory):
    out, _ = demo_run
    run = tmp_path_factory.mktemp("rep") / "run"
    shutil.copytree(out, run)
    r = CliRunner().invoke(app, ["report", str(run)])
    assert r.exit_code == 0, r.output
    return run, run / "report.html"


def test_report_is_self_contained_and_complete(report):
    run, page = report
    text = page.read_text()
    assert not re.search(r'(src|href)="(https?:)?//', text)        # no network needed
    imgs = re.findall(r'<img src="([^"]+)"', text)
    assert imgs and all(s.startswith("data:image/png;base64,") for s in imgs)
    for section in ("Counts", "Records", "Signal quality over time", "Kept beats per class",
                    "Scores that decide exclusions", "Excluded beats in context", "Rhythm"):
        assert f"<h2>{section}</h2>" in text
    assert "<h2>Provenance</h2><details>" in text                  # collapsed by default
    assert 'class="dataframe sortable"' in text and "<script>" in text
    assert "holds no abnormal beat" in text                        # the run's split warnings
    assert "[bandpass]" in text and "low_hz = " in text             # the configuration as TOML
    t = pd.read_parquet(run / "beats.parquet")
    noisy = t[t.reasons.str.contains("high_freq_noise")].beat_id
    assert any(b in text for b in noisy)                           # ready for 'beatmill why'
    assert "not a medical device" in text
    assert check_dataset(run) == []                                # check ignores report.html


def test_report_renders_in_a_headless_browser(report, tmp_path):
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if not chromium:
        pytest.skip("no chromium browser installed (Debian package 'chromium'; .ci/run installs it)")
    _, page = report
    shot = tmp_path / "shot.png"
    args = [chromium, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile'}"]
    dom = subprocess.run(args + ["--dump-dom", page.as_uri()], capture_output=True, text=True,
                         timeout=120)
    assert "<h1>beatmill dataset report</h1>" in dom.stdout
    assert "ERR_FILE_NOT_FOUND" not in dom.stderr and "Uncaught" not in dom.stderr
    subprocess.run(args + [f"--screenshot={shot}", "--window-size=1280,1600", page.as_uri()],
                   capture_output=True, timeout=120)
    import matplotlib.image as mpimg
    img = mpimg.imread(shot)
    assert img.shape[0] >= 1000 and img.shape[1] >= 1200
    assert float(np.std(img[..., :3])) > 0.05                     # not a blank page


def test_report_of_a_collection_stays_small_and_renders(tmp_path):
    # 150 short records (20 s slices of a demo record): the page must summarize, not grow
    # record by record (size bound: design choice, no source)
    import wfdb

    from prep.dataset.run import run
    from prep.report.html import write_report

    from ..conftest import DEMO
    r = wfdb.rdrecord(str(DEMO / "night01"))
    d = tmp_path / "recs"
    d.mkdir()
    n = int(20 * r.fs)
    for k in range(150):
        lo = (k * 997) % (r.p_signal.shape[0] - n)
        wfdb.wrsamp(f"s{k:03d}", fs=r.fs, units=["mV"] * 2, sig_name=["II", "V5"],
                    p_signal=r.p_signal[lo:lo + n], fmt=["16"] * 2, write_dir=str(d))
    run([d], tmp_path / "ds")
    page = write_report(tmp_path / "ds")
    size = page.stat().st_size
    assert size < 4_000_000, size
    text = page.read_text()
    assert "The 40 of 300 record-leads with the largest share" in text  # strip capped
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if chromium:
        dom = subprocess.run([chromium, *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'p'}",
                              "--dump-dom", page.as_uri()], capture_output=True, text=True,
                             timeout=120)
        assert "<h1>beatmill dataset report</h1>" in dom.stdout
