"""Recording formats: EDF/EDF+ (incl. EDF+D built from the specification), WFDB multi-segment
and multi-rate records, CSV annotations, and 12-lead records."""
import copy
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import wfdb

from prep.dataset.run import run
from prep.io.edf import parse_tals, read_edf
from prep.io.wfdb import read_wfdb

from ..conftest import DEMO, ref_path
from ..edf_by_hand import write_edf_plus


def _demo(name="night02"):
    return wfdb.rdrecord(str(DEMO / name)), wfdb.rdann(str(DEMO / name), "atr")


def test_edf_plus_written_by_the_reader_library(tmp_path):
    pyedflib = pytest.importorskip("pyedflib")
    r, a = _demo()
    path = tmp_path / "patch.edf"
    heads = [{"label": lab, "dimension": "uV", "sample_frequency": 250, "physical_max": 5000,
              "physical_min": -5000, "digital_max": 32767, "digital_min": -32768,
              "transducer": "", "prefilter": ""} for lab in ("ECG II", "ECG V5")]
    heads.append({"label": "Resp", "dimension": "NU", "sample_frequency": 25,
                  "physical_max": 100, "physical_min": -100, "digital_max": 32767,
                  "digital_min": -32768, "transducer": "", "prefilter": ""})
    with pyedflib.EdfWriter(str(path), 3, file_type=pyedflib.FILETYPE_EDFPLUS) as f:
        f.set_number_of_annotation_signals(4)  # room for more than one beat per data record
        f.setSignalHeaders(heads)
        f.writeSamples([r.p_signal[:, 0] * 1000, r.p_signal[:, 1] * 1000,
                        np.zeros(r.p_signal.shape[0] // 10)])
        for s, y in zip(a.sample, a.symbol):
            f.writeAnnotation(s / 250.0, -1, y)
    rec = read_edf(path)
    assert rec.leads == ["II", "V5"] and rec.fs == 250.0
    assert [n for n, _ in rec.skipped] == ["Resp"]
    np.testing.assert_allclose(rec.signals[0], r.p_signal[:, 0], atol=2e-4)  # 16-bit over 10 mV
    np.testing.assert_array_equal(rec.annotations.sample, a.sample)
    s = run([path], tmp_path / "out")
    t = pd.read_parquet(tmp_path / "out" / "beats.parquet")
    assert s.exit_code == 0 and (t[t.included].label == "V").sum() == (np.array(a.symbol) == "V").sum()


def test_edf_plus_d_jumps_become_gaps(tmp_path):
    r, _ = _demo("night01")
    onsets = list(range(60)) + [k + 30 for k in range(60, 180)]   # 30 s missing after 60 s
    path = tmp_path / "night.edf"
    write_edf_plus(path, r.p_signal.T * 1000, ["ECG II", "ECG V5"], 250, 1, onsets)
    rec = read_edf(path)
    assert rec.signals.shape == (2, 210 * 250)
    assert np.isnan(rec.signals[:, 60 * 250:90 * 250]).all()
    assert not np.isnan(rec.signals[:, :60 * 250]).any()
    np.testing.assert_allclose(rec.signals[0, 90 * 250:], r.p_signal[60 * 250:, 0], atol=1e-4)
    run([path], tmp_path / "out")
    t = pd.read_parquet(tmp_path / "out" / "beats.parquet")
    # no beat inside the gap, and beats whose window touches it are excluded
    assert not ((t.r_time_s > 60.4) & (t.r_time_s < 89.6)).any()
    # no kept beat's window (-250..+400 ms) touches the gap (in_gap, or not a beat at all: the
    # bridged edge can look like a one-lead complex)
    assert not (t.included & (t.r_time_s > 60 - 0.4) & (t.r_time_s < 90 + 0.25)).any()
    assert (~t.included & (t.r_time_s > 59.5) & (t.r_time_s < 90.5)).any()


def test_tal_parser():
    # EDF+ specification: "+onset[\x15duration]\x14text\x14...\x00"
    assert parse_tals(b"+0\x14\x14\x00+1.5\x150.5\x14Lights off\x14\x00") == [
        (0.0, 0.0, [""]), (1.5, 0.5, ["Lights off"])]


def test_wfdb_multisegment_record(tmp_path):
    r, _ = _demo("night01")
    for k, (a, b) in enumerate(((0, 22500), (22500, 45000))):
        wfdb.wrsamp(f"seg_{k}", fs=250, units=["mV", "mV"], sig_name=["II", "V5"],
                    p_signal=r.p_signal[a:b], fmt=["16", "16"], write_dir=str(tmp_path))
    (tmp_path / "multi.hea").write_text("multi/2 2 250 45000\nseg_0 22500\nseg_1 22500\n")
    rec = read_wfdb(tmp_path / "multi")
    assert rec.signals.shape == (2, 45000)
    s = run([tmp_path], tmp_path / "out")
    recs = pd.read_parquet(tmp_path / "out" / "records.parquet")
    assert recs.record.tolist() == ["multi"] and s.exit_code == 0  # segments are not records


def test_wfdb_several_sampling_rates(tmp_path):
    r, _ = _demo("night01")
    n = r.p_signal.shape[0]
    # ECG at 250 Hz (2 samples per frame at a 125 Hz frame rate), respiration at 125 Hz
    ecg = r.p_signal[:, 0]
    resp = np.sin(np.arange(n // 2) / 50.0)
    # written by hand from the WFDB header format: "16x2" = format 16, 2 samples per frame
    frames = np.column_stack([np.round(ecg[0::2] * 1000), np.round(ecg[1::2] * 1000),
                              np.round(resp * 1000)]).astype("<i2")
    (tmp_path / "mixed.dat").write_bytes(frames.tobytes())
    (tmp_path / "mixed.hea").write_text(
        f"mixed 2 125 {n // 2}\nmixed.dat 16x2 1000/mV 16 0 0 0 0 ECG\n"
        "mixed.dat 16 1000/NU 16 0 0 0 0 RESP\n")
    got = read_wfdb(tmp_path / "mixed")
    assert got.fs == 250 and got.signals.shape == (1, n)
    np.testing.assert_allclose(got.signals[0], ecg, atol=1e-3)
    assert got.skipped[0][0] == "RESP"


def test_csv_annotations(tmp_path):
    r, a = _demo()
    df = pd.DataFrame(r.p_signal, columns=r.sig_name)
    df.to_csv(tmp_path / "p.csv", index=False)
    pd.DataFrame({"time_s": a.sample / 250.0, "symbol": a.symbol}).to_csv(
        tmp_path / "p.annotations.csv", index=False)
    run([tmp_path / "p.csv"], tmp_path / "out", csv_fs=250)
    t = pd.read_parquet(tmp_path / "out" / "beats.parquet")
    assert (t.label == "V").sum() == (np.array(a.symbol) == "V").sum()
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet")
    assert "p.annotations.csv" in [x["file"] for x in rec.inputs[0]]


@pytest.mark.refdata
def test_twelve_lead_records(tmp_path):
    # LUDB (500 Hz, 10 s, 12 leads) and PTB s0010_re (1000 Hz, 12 standard + 3 Frank leads)
    ludb, ptb = ref_path("ludb", "1"), ref_path("ptbdb", "s0010_re")
    s = run([str(ludb), str(ptb)], tmp_path / "out")
    m = json.loads((tmp_path / "out" / "manifest.json").read_text())
    std = ["I", "II", "III", "aVR", "aVL", "aVF", "V1", "V2", "V3", "V4", "V5", "V6"]
    assert m["lead_axis"] == std and m["tensor"]["shape"][1] == 12
    x = np.load(tmp_path / "out" / "beats.npy")
    assert x.shape[1:] == (12, 256) and x.shape[0] >= 40
    leads = pd.read_parquet(tmp_path / "out" / "leads.parquet")
    assert set(leads[~leads.in_axis].lead) == {"vx", "vy", "vz"}  # Frank leads: only on request
    assert s.exit_code == 0


# ---- the format registry ---------------------------------------------------------------------

def test_every_format_module_is_registered_and_scans_agree_with_explicit_paths(tmp_path):
    # common practice, no source: a folder scan and an explicit path must find the same records
    import importlib
    import pkgutil

    import prep.io as io_pkg
    from prep.io.sources import FORMATS, find_sources
    modules = [m.name for m in pkgutil.iter_modules(io_pkg.__path__)
               if not m.name.startswith("_") and m.name != "sources"]
    registered = {importlib.import_module(f"prep.io.{m}").FORMAT.kind for m in modules}
    assert registered == set(FORMATS)
    assert all(s == s.lower() and s.startswith(".") for f in FORMATS.values() for s in f.suffixes)
    for name in ("night01.hea", "night01.dat", "night01.atr"):
        shutil.copy(DEMO / name, tmp_path / name)
    write_edf_plus(tmp_path / "patch.EDF", np.zeros((1, 2500)), ["ECG II"], 250, 1, [0.0])
    shutil.copy(tmp_path / "patch.EDF", tmp_path / "other.bdf")
    (tmp_path / "loop").mkdir()
    (tmp_path / "loop" / "back").symlink_to(tmp_path, target_is_directory=True)
    notes = []
    scanned, problems = find_sources([tmp_path], notes=notes)
    explicit, _ = find_sources([tmp_path / "night01.hea", tmp_path / "patch.EDF",
                                tmp_path / "other.bdf"])
    assert scanned == explicit and [s.kind for s in scanned] == ["wfdb", "edf", "edf"]
    assert not problems and not notes


def test_upper_case_wfdb_files_are_read(tmp_path):
    # PhysioNet's own files are lower case, but copies from some systems are not
    for ext in ("hea", "dat", "atr"):
        shutil.copy(DEMO / f"night01.{ext}", tmp_path / f"NIGHT01.{ext.upper()}")
    h = (tmp_path / "NIGHT01.HEA").read_text().replace("night01", "NIGHT01").replace(
        "NIGHT01.dat", "NIGHT01.DAT")
    (tmp_path / "NIGHT01.HEA").write_text(h)
    from prep.config import Config
    from prep.io.sources import find_sources, read_source, record_length, source_inputs
    notes = []
    found, problems = find_sources([tmp_path], notes=notes)
    assert [s.name for s in found] == ["NIGHT01"] and not problems and not notes
    rec = read_source(found[0], Config().read)
    ref = read_wfdb(DEMO / "night01")
    np.testing.assert_array_equal(rec.signals, ref.signals)
    assert rec.annotations is not None and len(rec.annotations.sample) == len(ref.annotations.sample)
    assert rec.path.endswith("NIGHT01.HEA") and record_length(found[0])[0] == ref.n_samples
    assert {n for n, _ in source_inputs(found[0], Config().read)} == {"NIGHT01.HEA", "NIGHT01.DAT",
                                                                       "NIGHT01.ATR"}


_HEADER_VARIANTS = [
    "rec 2 360 650000\nrec.dat 212 200 11 1024 995 -22131 0 MLII\n"
    "rec.dat 212 200 11 1024 1011 20052 0 V5\n",
    "# a comment first\nrec 1\nrec.dat 16 200(0)/uV 16 0 0 0 0 ECG II\n",       # no rate
    "rec 2 500.000/1000(0) 5000 10:11:12 01/02/2003\nrec.dat 16x2:1+512 1000/mV 16 0 0 0 0 I\n"
    "rec.dat 16x2 1000 16 0 0 0 0 aVR   \n",                                 # frames, skew, offset
    "rec 1 257.5\nrec.dat 80 100 8\n",                                       # rate, no name
    "rec/2 2 360 1000\nseg1 500\nseg2 500\n",                                # multi-segment
]


def _same_header(quick, ref, where) -> None:
    """Every attribute of wfdb.rdheader's Record, with the same value and type."""
    assert type(quick) is type(ref), where
    assert sorted(vars(quick)) == sorted(vars(ref)), where
    for k, v in vars(ref).items():
        got = getattr(quick, k)
        assert (got, type(got)) == (v, type(v)), (where, k)
        if isinstance(v, list):
            assert [type(x) for x in got] == [type(x) for x in v], (where, k)


@pytest.mark.parametrize("text", _HEADER_VARIANTS)
def test_quick_header_reads_what_wfdb_reads(tmp_path, text):
    # the wfdb library's own rdheader is the reference for every field of the header
    from prep.io._wfdb_header import _quick_header
    (tmp_path / "rec.hea").write_text(text)
    quick = _quick_header(tmp_path / "rec.hea")
    if "/2 " in text.splitlines()[0]:
        assert quick is None  # multi-segment: left to wfdb
        return
    _same_header(quick, wfdb.rdheader(str(tmp_path / "rec")), text)


def test_quick_header_on_every_reference_header():
    # every header of the open databases in ../shared and of demo_records (wfdb as reference)
    from prep.io._wfdb_header import _quick_header

    from ..conftest import REF
    files = sorted(DEMO.glob("*.hea")) + (sorted(REF.rglob("*.hea")) if REF.is_dir() else [])
    for f in files:
        _same_header(_quick_header(f), wfdb.rdheader(str(f)[:-4]), f.name)


def test_reader_reads_the_samples_wfdb_reads():
    # the reader parses a header once and reads the samples with wfdb's own steps: the record
    # must be wfdb.rdrecord's (physical, 64-bit) for whole records and for stretches; every
    # record in demo_records and ../shared (wfdb as reference)
    from prep.io._wfdb_header import _quick_header
    from prep.io.wfdb import _read_samples

    from ..conftest import REF
    files = sorted(DEMO.glob("*.hea")) + (sorted(REF.rglob("*.hea")) if REF.is_dir() else [])
    for f in files:
        base = Path(str(f)[:-4])
        header = _quick_header(f)
        if header is None or any(x != 1 for x in header.samps_per_frame):
            continue
        n = header.sig_len or 0
        for lo, hi in ((0, None), (0, min(n, 1000) or None), (n // 3, n // 2 or None)):
            ref = wfdb.rdrecord(str(base), physical=True, return_res=64, sampfrom=lo,
                                **({"sampto": hi} if hi else {}))
            got = _read_samples(copy.deepcopy(header), base, lo, hi)
            np.testing.assert_array_equal(got.p_signal, ref.p_signal, err_msg=f.name)
            assert got.p_signal.dtype == ref.p_signal.dtype
            for k in ("sig_name", "units", "fs", "sig_len", "comments", "adc_gain", "baseline"):
                assert getattr(got, k) == getattr(ref, k), (f.name, k)
