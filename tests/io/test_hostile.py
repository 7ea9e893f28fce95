"""Hostile inputs, second round: nothing is written wrong, nothing fails without a message that
names the file, and an interrupted write never leaves a mixed dataset."""
import json
import os
import shutil

import numpy as np
import pandas as pd
import pytest
import wfdb

from prep.config import Config
from prep.dataset.run import run
from prep.errors import ConfigError, RecordError
from prep.io.csv import read_csv
from prep.io.sources import find_sources, read_source
from prep.io.wfdb import read_wfdb

from ..conftest import DEMO


def _night01(d, name="night01"):
    for ext in ("hea", "dat", "atr"):
        shutil.copy(DEMO / f"night01.{ext}", d / f"{name}.{ext}")
    if name != "night01":
        h = (d / f"{name}.hea").read_text().replace("night01", name)
        (d / f"{name}.hea").write_text(h)


def test_signals_one_after_another_in_one_file_are_refused(tmp_path):
    # WFDB header format (PhysioNet 'header' man page): "16+4000" is format 16 at byte
    # offset 4000; two signals at two offsets in one file are not interleaved frames
    n = 2000
    a, b = np.arange(n, dtype="<i2"), (np.arange(n) % 100).astype("<i2")
    (tmp_path / "off.dat").write_bytes(a.tobytes() + b.tobytes())
    (tmp_path / "off.hea").write_text(f"off 2 250 {n}\noff.dat 16+0 1000/mV 16 0 0 0 0 II\n"
                                      f"off.dat 16+{2 * n} 1000/mV 16 0 0 0 0 V5\n")
    with pytest.raises(RecordError, match="byte offsets"):
        read_wfdb(tmp_path / "off")


def test_a_wfdb_record_and_a_csv_of_one_name_are_two_records(tmp_path):
    _night01(tmp_path)
    r = wfdb.rdrecord(str(DEMO / "night01"))
    pd.DataFrame(r.p_signal, columns=r.sig_name).to_csv(tmp_path / "night01.csv", index=False)
    (tmp_path / "night01.json").write_text(json.dumps({"fs": r.fs}))
    notes = []
    found, _ = find_sources([tmp_path], notes=notes)
    assert sorted(s.name for s in found) == ["night01", "night01.csv"]
    assert "share this name" in notes[0]
    s = run([tmp_path], tmp_path / "out")
    assert s.n_records == 2 and s.n_failed == 0


def test_a_killed_swap_is_completed_before_anyone_reads(tmp_path, demo_run):
    from prep.dataset.check import check_dataset
    from prep.dataset.folder import JOURNAL
    from prep.dataset.view import open_dataset
    out, _ = demo_run
    target = tmp_path / "ds"
    shutil.copytree(out, target)
    # a run killed after moving beats.npy in, before the rest: the journal and staging remain
    staging = target / ".staging-999999"
    staging.mkdir()
    for f in target.iterdir():
        if f.is_file():
            shutil.copy(f, staging / f.name)
    os.replace(staging / "beats.npy", target / "beats.npy")
    (target / JOURNAL).write_text(json.dumps({"staging": staging.name, "files": [
        "beats.npy", "lead_mask.npy", "norm_center.npy", "norm_scale.npy", "beats.parquet",
        "leads.parquet", "records.parquet", "windows.parquet", "manifest.json"]}))
    assert check_dataset(target) == []
    assert not (target / JOURNAL).exists() and not staging.exists()
    assert open_dataset(target).beats.shape[0] > 0


def test_staging_of_a_killed_run_is_removed_by_the_next(tmp_path, demo_run):
    out, _ = demo_run
    target = tmp_path / "ds"
    shutil.copytree(out, target)
    (target / ".staging-999999").mkdir()
    run([DEMO], target)
    assert not (target / ".staging-999999").exists()


def test_csv_time_columns_separators_and_sidecars(tmp_path):
    r = wfdb.rdrecord(str(DEMO / "night01"))
    df = pd.DataFrame(r.p_signal[:5000], columns=r.sig_name)
    df.insert(0, "Time (s)", np.arange(len(df)) / r.fs)
    df["elapsed_samples"] = np.arange(len(df)) + 10
    df.to_csv(tmp_path / "a.csv", index=False)
    rec = read_csv(tmp_path / "a.csv", fs=r.fs)
    assert rec.leads == ["II", "V5"] and len(rec.skipped) == 2
    # ';' separators with decimal commas, as a spreadsheet in many locales writes them
    df[["II", "V5"]].to_csv(tmp_path / "b.csv", index=False, sep=";", decimal=",")
    rec = read_csv(tmp_path / "b.csv", fs=r.fs)
    np.testing.assert_allclose(rec.signals, r.p_signal[:5000].T, atol=1e-9)
    (tmp_path / "b.json").write_text("[250]")
    with pytest.raises(RecordError, match="not an object"):
        read_csv(tmp_path / "b.csv")


def test_empty_or_damaged_annotations_leave_the_record_unlabelled_with_a_warning(tmp_path):
    _night01(tmp_path)
    (tmp_path / "night01.atr").write_bytes(b"")
    rec = read_wfdb(tmp_path / "night01")
    assert rec.annotations is None and "night01.atr is empty" in rec.warnings[0]
    (tmp_path / "night01.atr").write_bytes(os.urandom(333))
    rec = read_wfdb(tmp_path / "night01")
    assert rec.annotations is None and "cannot be read" in rec.warnings[0]


def test_unknown_text_labels_are_named_with_their_counts(tmp_path):
    _night01(tmp_path)
    (tmp_path / "night01.atr").unlink()
    a = wfdb.rdann(str(DEMO / "night01"), "atr")
    pd.DataFrame({"sample": a.sample, "symbol": ["Normal"] * len(a.sample)}).to_csv(
        tmp_path / "night01.annotations.csv", index=False)
    s = run([tmp_path / "night01.hea"], tmp_path / "out")
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet")
    assert "'Normal' x" in rec.warnings[0] and s.n_records == 1


def test_an_exact_copy_of_a_lead_is_used_once(tmp_path):
    r = wfdb.rdrecord(str(DEMO / "night01"))
    sig = np.column_stack([r.p_signal, r.p_signal[:, 0]])
    wfdb.wrsamp("dup", fs=r.fs, units=["mV"] * 3, sig_name=["II", "V5", "III"], p_signal=sig,
                fmt=["16"] * 3, write_dir=str(tmp_path))
    run([tmp_path / "dup.hea"], tmp_path / "out")
    leads = pd.read_parquet(tmp_path / "out" / "leads.parquet").set_index("lead")
    assert not leads.loc["III", "used"] and "exact copy of lead II" in leads.loc["III", "reason"]


def test_a_long_gap_leaves_the_recorded_minutes_usable(tmp_path):
    # 3 minutes recorded, then 10 minutes of missing samples (WFDB's invalid-sample value)
    r = wfdb.rdrecord(str(DEMO / "night01"))
    n_gap = int(600 * r.fs)
    sig = np.vstack([r.p_signal, np.full((n_gap, 2), np.nan)])
    wfdb.wrsamp("gap", fs=r.fs, units=["mV"] * 2, sig_name=["II", "V5"], p_signal=sig,
                fmt=["16"] * 2, write_dir=str(tmp_path))
    s = run([tmp_path / "gap.hea"], tmp_path / "out")
    assert s.n_no_lead == 0 and s.n_kept > 150


def test_environment_and_config_mistakes_are_messages(tmp_path, monkeypatch):
    monkeypatch.setenv("BEATMILL_WORKERS", "abc")
    with pytest.raises(ConfigError, match="BEATMILL_WORKERS='abc'"):
        run([DEMO / "night01.hea"], tmp_path / "o")
    (tmp_path / "cfg").mkdir()
    with pytest.raises(ConfigError, match="is a folder"):
        Config.from_toml(tmp_path / "cfg")


def test_an_edf_with_zero_duration_records_is_named(tmp_path):
    from ..edf_by_hand import write_edf_plus
    p = tmp_path / "z.edf"
    write_edf_plus(p, np.zeros((1, 2500)), ["ECG II"], 250, 1, [0.0], discontinuous=False)
    raw = bytearray(p.read_bytes())
    raw[244:252] = b"0       "
    p.write_bytes(bytes(raw))
    found, _ = find_sources([p])
    with pytest.raises(RecordError, match="duration of a data record must be positive"):
        read_source(found[0], Config().read)


def test_a_record_without_usable_lead_names_its_file(tmp_path):
    n = 45000
    wfdb.wrsamp("flat", fs=250, units=["mV"] * 2, sig_name=["II", "V5"],
                p_signal=np.zeros((n, 2)), fmt=["16"] * 2, write_dir=str(tmp_path))
    run([tmp_path / "flat.hea"], tmp_path / "out")
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet")
    assert rec.status[0] == "no_usable_lead" and "flat.hea" in rec.error[0]


def test_header_text_problems_are_said_in_the_files_terms(tmp_path):
    # WFDB header format (PhysioNet 'header' man page): the record line's second field is the
    # number of signal lines that follow
    np.zeros(2000, "<i2").tofile(tmp_path / "x.dat")
    (tmp_path / "x.hea").write_text("x 3 250 1000\nx.dat 16 1000 16 0 0 0 0 II\n")
    with pytest.raises(RecordError, match="declares 3 signals but the header has 1"):
        read_wfdb(tmp_path / "x")
    (tmp_path / "x.hea").write_bytes("x 1 250 1000\nx.dat 16 1000 16 0 0 0 0 II\n# M\xfcller\n"
                                     .encode("latin-1"))
    rec = read_wfdb(tmp_path / "x")
    assert "not UTF-8" in rec.warnings[0] and rec.leads == ["II"]
    (tmp_path / "y.hea").mkdir()
    with pytest.raises(RecordError, match="header path is a folder"):
        read_wfdb(tmp_path / "y")


def test_records_of_one_name_in_nested_folders_and_disjoint_lead_names(tmp_path):
    r = wfdb.rdrecord(str(DEMO / "night01"))
    for sub, lead in (("a", "II"), ("b", "V5"), ("c", "ECG3")):
        (tmp_path / sub).mkdir()
        wfdb.wrsamp("rec", fs=r.fs, units=["mV"], sig_name=[lead], p_signal=r.p_signal[:, :1],
                    fmt=["16"], write_dir=str(tmp_path / sub))
    found, _ = find_sources([tmp_path])
    assert sorted(s.name for s in found) == ["a/rec", "b/rec", "c/rec"]
    # no lead is in half of the records: the batch still runs, on the most common leads
    s = run([tmp_path], tmp_path / "out")
    assert s.n_records == 3 and s.exit_code in (0, 1) and s.warnings


def test_two_channels_of_one_name_are_processed(tmp_path):
    # a recorder that names every channel "ECG": each lead keeps its own window table
    import prep
    r = wfdb.rdrecord(str(DEMO / "night01"))
    a = prep.process(r.p_signal.T, r.fs, leads=["ECG", "ECG"])
    assert a.records.status[0] == "ok" and a.records.n_kept[0] > 150
