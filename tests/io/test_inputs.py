"""Broken and hostile inputs: the batch finishes, every problem is named, nothing is corrupted."""
import errno
import shutil
import signal as sig
from contextlib import contextmanager

import numpy as np
import pandas as pd
import pytest
import wfdb
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import prep
from prep.config import Config
from prep.dataset.check import check_dataset
from prep.dataset.run import run
from prep.errors import EXIT_SOME_FAILED

from ..conftest import DEMO


def _one(src, tmp_path, **kw):
    """Run the batch [night01, src] and return night01's and src's records rows."""
    s = run([DEMO / "night01.hea", src], tmp_path / "out", **kw)
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet").set_index("record")
    assert rec.loc["night01", "status"] == "ok"
    assert check_dataset(tmp_path / "out") == []
    return s, rec


def _copy(tmp_path, name="night03", new="bad"):
    d = tmp_path / "in"
    d.mkdir(exist_ok=True)
    for ext in ("hea", "dat", "atr"):
        data = (DEMO / f"{name}.{ext}").read_bytes()
        if ext == "hea":
            data = data.replace(name.encode(), new.encode())
        (d / f"{new}.{ext}").write_bytes(data)
    return d / new


def _status(rec, name):
    return rec.loc[name, "status"], rec.loc[name, "error"], rec.loc[name, "warnings"]


def test_truncated_signal_file_reads_what_is_there(tmp_path):
    base = _copy(tmp_path)
    dat = base.with_suffix(".dat")
    dat.write_bytes(dat.read_bytes()[: 2 * 2 * 250 * 60])  # one minute of two 16-bit leads
    s, rec = _one(str(base), tmp_path)
    st_, err, warn = _status(rec, "bad")
    assert st_ == "ok" and "holds 15000" in warn and rec.loc["bad", "duration_s"] == 60.0


def test_enormous_declared_length_with_tiny_file(tmp_path):
    base = _copy(tmp_path)
    hea = base.with_suffix(".hea")
    hea.write_text(hea.read_text().replace(" 45000", " 1900000000", 1))
    base.with_suffix(".dat").write_bytes(b"\x00" * 400)
    st_, err, _ = _status(_one(str(base), tmp_path)[1], "bad")
    assert st_ == "failed" and "s long" in err  # 100 samples: shorter than a beat window


def test_zero_length_and_not_a_header(tmp_path):
    base = _copy(tmp_path)
    base.with_suffix(".dat").write_bytes(b"")
    other = _copy(tmp_path, "night04", "junk")
    other.with_suffix(".hea").write_bytes(np.random.default_rng(0).bytes(300))
    s = run([DEMO / "night01.hea", base.parent], tmp_path / "out")
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet").set_index("record")
    assert "zero-length" in rec.loc["bad", "error"]
    assert rec.loc["junk", "status"] == "failed" and "junk.hea" in rec.loc["junk", "error"]
    assert s.exit_code == EXIT_SOME_FAILED


@pytest.mark.parametrize("fs_field,expect", [("0", "not usable"), ("1e9", "not a plain number"),
                                             ("20", "not usable"), ("900000", "not usable")])
def test_bad_sampling_rates(tmp_path, fs_field, expect):
    base = _copy(tmp_path)
    hea = base.with_suffix(".hea")
    hea.write_text(hea.read_text().replace("bad 2 250 ", f"bad 2 {fs_field} ", 1))
    st_, err, _ = _status(_one(str(base), tmp_path)[1], "bad")
    assert st_ == "failed" and expect in err and "bad.hea" in err


def test_missing_rate_uses_wfdb_default_with_a_warning(tmp_path):
    base = _copy(tmp_path)
    hea = base.with_suffix(".hea")
    hea.write_text(hea.read_text().replace("bad 2 250 45000", "bad 2", 1))
    st_, err, warn = _status(_one(str(base), tmp_path)[1], "bad")
    assert st_ == "ok" and "default of 250 Hz" in warn


def test_unknown_signal_format(tmp_path):
    base = _copy(tmp_path)
    hea = base.with_suffix(".hea")
    hea.write_text(hea.read_text().replace("bad.dat 16 ", "bad.dat 999 "))
    st_, err, _ = _status(_one(str(base), tmp_path)[1], "bad")
    assert st_ == "failed" and "format" in err


def test_nan_and_inf_become_gaps(tmp_path):
    r = wfdb.rdrecord(str(DEMO / "night01"))
    x = r.p_signal.T.copy()
    x[0, 10000:10100] = np.nan
    x[1, 20000:20050] = np.inf
    out = prep.process(x, r.fs, leads=r.sig_name)
    t = out.table
    gap_beats = t[t.reasons.str.contains("in_gap")]
    assert len(gap_beats) >= 2
    assert ((gap_beats.r_sample - 10050).abs().min() < 200) and \
        ((gap_beats.r_sample - 20025).abs().min() < 200)
    assert np.isfinite(out.beats).all()


def test_annotation_file_for_another_record(tmp_path):
    base = _copy(tmp_path, "night01", "moved")
    shutil.copy(DEMO / "night04.atr", base.with_suffix(".atr"))  # another record's annotations
    s = run([str(base)], tmp_path / "out")
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet")
    assert "do not fit this signal" in rec.warnings[0]
    assert (pd.read_parquet(tmp_path / "out" / "beats.parquet").label == "").all()


def test_out_of_range_annotations_are_dropped(tmp_path):
    base = _copy(tmp_path, "night01", "oor")
    a = wfdb.rdann(str(DEMO / "night01"), "atr")
    wfdb.wrann("oor", "atr", np.r_[a.sample, 10 ** 7], symbol=list(a.symbol) + ["N"],
               write_dir=str(base.parent))
    s = run([str(base)], tmp_path / "out")
    assert s.exit_code == 0


def test_non_ecg_only(tmp_path):
    d = tmp_path / "in"
    d.mkdir()
    wfdb.wrsamp("bp", fs=125, units=["mmHg", "NU"], sig_name=["ABP", "PLETH"],
                p_signal=np.random.default_rng(0).normal(size=(5000, 2)), fmt=["16", "16"],
                write_dir=str(d))
    st_, err, _ = _status(_one(str(d / "bp"), tmp_path)[1], "bp")
    assert st_ == "failed" and "no ECG channel" in err


def test_duplicate_names_spaces_and_non_ascii_paths(tmp_path):
    a = tmp_path / "nuit à Brackenfold" / "site A"
    b = tmp_path / "nuit à Brackenfold" / "site B"
    for d in (a, b):
        d.mkdir(parents=True)
        for ext in ("hea", "dat", "atr"):
            shutil.copy(DEMO / f"night01.{ext}", d)
    s = run([tmp_path / "nuit à Brackenfold"], tmp_path / "out dir")
    rec = pd.read_parquet(tmp_path / "out dir" / "records.parquet")
    assert sorted(rec.record) == ["site A/night01", "site B/night01"]
    assert (rec.status == "ok").all()
    t = pd.read_parquet(tmp_path / "out dir" / "beats.parquet")
    assert t.beat_id.is_unique


def test_csv_with_text_in_a_numeric_column(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("II,V5\n" + "0.1,0.2\n" * 10 + "0.1,oops\n" + "0.1,0.2\n" * 5000)
    st_, err, _ = _status(_one(str(p), tmp_path, csv_fs=250)[1], "c")
    assert st_ == "failed" and "column 'V5' holds text (first at line 12" in err


def test_config_problems_before_any_work(tmp_path):
    p = tmp_path / "c.toml"
    p.write_text("[bandpass]\nhigh_hz = 'x'\nwat = 1\n[segment]\nbefore_ms = -5\n")
    with pytest.raises(prep.ConfigError) as e:
        Config.from_toml(p)
    assert len(e.value.problems) == 3


def test_record_dependent_config_adapts_or_fails_that_record(tmp_path):
    # an upper band-pass edge above 0.45 x fs of a 250 Hz record adapts (recorded); a window longer
    # than a short record fails that record only
    cfg = Config().replace(bandpass={"high_hz": 120.0}, segment={"after_ms": 2900.0,
                                                                 "before_ms": 1900.0})
    d = tmp_path / "in"
    d.mkdir()
    r = wfdb.rdrecord(str(DEMO / "night01"))
    wfdb.wrsamp("short", fs=250, units=["mV", "mV"], sig_name=r.sig_name,
                p_signal=r.p_signal[:1000], fmt=["16", "16"], write_dir=str(d))
    s = run([DEMO / "night01.hea", d / "short"], tmp_path / "out", config=cfg)
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet").set_index("record")
    assert rec.loc["short", "status"] == "failed" and "s long" in rec.loc["short", "error"]
    import json
    m = json.loads((tmp_path / "out" / "manifest.json").read_text())
    bp = [x for x in m["records"]["night01"]["stages"] if x["stage"] == "bandpass"][0]
    assert "lowered" in bp["warnings"][0]


def test_out_of_space_leaves_previous_state_intact(demo_run, tmp_path, monkeypatch):
    out, _ = demo_run
    target = tmp_path / "ds"
    shutil.copytree(out, target)
    before = {f.name: f.read_bytes() for f in target.iterdir() if f.is_file()}
    import prep.dataset.assemble as D

    def full(*a, **k):
        raise OSError(errno.ENOSPC, "No space left on device", str(target / "beats.parquet"))
    monkeypatch.setattr(D, "write_parquet", full)
    with pytest.raises(OSError):
        run([DEMO / "night01.hea"], target, overwrite=True)
    assert {f.name: f.read_bytes() for f in target.iterdir() if f.is_file()} == before
    assert not [p for p in target.iterdir() if p.name.startswith(".staging")]


# ---- property-based and fuzz tests ---------------------------------------------------------

arrays = st.integers(1, 3).flatmap(lambda n_leads: st.tuples(
    st.just(n_leads), st.sampled_from([50.0, 128.0, 250.0, 360.0, 1000.0]),
    st.integers(0, 6000), st.integers(0, 2**31 - 1),
    st.sampled_from(["noise", "spikes", "const", "nan_runs", "huge", "inf"])))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(arrays)
def test_property_no_unhandled_exception(case):
    n_leads, fs, n, seed, kind = case
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 0.1, (n_leads, n))
    if kind == "spikes" and n:
        x[:, :: max(1, int(fs * 0.8))] += 2.0
    elif kind == "const":
        x[:] = 1.5
    elif kind == "nan_runs" and n:
        x[:, rng.integers(0, n, 5)] = np.nan
    elif kind == "huge":
        x *= 1e12
    elif kind == "inf" and n:
        x[0, rng.integers(0, n)] = np.inf
    out = prep.process(x, fs)
    t = out.table
    assert out.records.status.iloc[0] in ("ok", "failed", "no_usable_lead")
    assert np.isfinite(out.beats).all()
    assert (t.included == (t.reasons == "")).all()
    assert int(t.included.sum()) == out.beats.shape[0]


class _Timeout(Exception):
    pass


@contextmanager
def _time_limit(seconds):
    def handler(*_):
        raise _Timeout()
    old = sig.signal(sig.SIGALRM, handler)
    sig.alarm(seconds)
    try:
        yield
    finally:
        sig.alarm(0)
        sig.signal(sig.SIGALRM, old)


@pytest.mark.parametrize("case", range(24))
def test_fuzz_mutated_wfdb_files(tmp_path, case):
    rng = np.random.default_rng(case)
    base = _copy(tmp_path, ["night01", "night04", "night07"][case % 3], "fz")
    target = base.with_suffix([".hea", ".dat", ".atr"][case % 3 if case < 18 else rng.integers(3)])
    data = bytearray(target.read_bytes())
    if case % 2 and len(data) > 10:
        data = data[: int(rng.integers(1, len(data)))]          # truncation
    else:
        for i in rng.integers(0, len(data), max(1, len(data) // 500)):
            data[i] ^= 1 << int(rng.integers(8))                   # bit flips
    target.write_bytes(bytes(data))
    with _time_limit(60):                                           # no hang
        s = run([DEMO / "night01.hea", str(base)], tmp_path / "out")
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet").set_index("record")
    assert rec.loc["night01", "status"] == "ok"
    assert rec.loc["fz", "status"] in ("ok", "failed", "no_usable_lead")
    if rec.loc["fz", "status"] == "failed":
        assert rec.loc["fz", "error"]
    assert check_dataset(tmp_path / "out") == []
