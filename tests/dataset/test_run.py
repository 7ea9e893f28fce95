"""The whole job on demo_records and real records: outputs, invariants, determinism, failures."""
import json
import shutil

import numpy as np
import pandas as pd
import pytest

from prep.config import Config
from prep.dataset.check import check_dataset
from prep.dataset.run import run
from prep.demo import write_demo
from prep.errors import EXIT_NONE_USABLE, EXIT_OK, EXIT_SOME_FAILED
from prep.evaluate import match_beats
from prep.schema import TABLE_FILES, TENSOR_FILES

from ..conftest import DEMO, ref_path

TRUTH = json.loads((DEMO / "truth.json").read_text())


def test_demo_records_regenerate_byte_for_byte(tmp_path):
    write_demo(tmp_path)
    for f in sorted(DEMO.iterdir()):
        if f.suffix in (".hea", ".dat", ".atr", ".json"):
            assert (tmp_path / f.name).read_bytes() == f.read_bytes(), f.name


def test_outputs_and_invariants(demo_run):
    out, summary = demo_run
    assert summary.exit_code == EXIT_OK and summary.axis == ["II", "V5"]
    for f in TENSOR_FILES + TABLE_FILES + ("manifest.json",):
        assert (out / f).exists()
    beats = np.load(out / "beats.npy", mmap_mode="r")
    assert beats.dtype == np.float32 and beats.flags.c_contiguous and beats.shape[1:] == (2, 256)
    table = pd.read_parquet(out / "beats.parquet")
    kept = table[table.included]
    assert len(kept) == beats.shape[0]
    assert sorted(kept.tensor_index.tolist()) == list(range(beats.shape[0]))
    assert (table.loc[~table.included, "reasons"] != "").all()
    assert check_dataset(out) == []
    # normalization statistics invert the tensor back to mV (z-score per beat by default)
    c, s = np.load(out / "norm_center.npy"), np.load(out / "norm_scale.npy")
    mv = beats * s[..., None] + c[..., None]
    assert np.abs(mv[:, 0]).max() < 5.0  # plausible mV range for the synthetic beats
    m = json.loads((out / "manifest.json").read_text())
    assert m["lead_axis"] == ["II", "V5"] and m["config_sha256"]
    stages = {st["stage"]: st for st in m["records"]["night03"]["stages"]}
    assert stages["powerline"]["derived"]["mains_hz"] == 50.0
    stages4 = {st["stage"]: st for st in m["records"]["night04"]["stages"]}
    assert stages4["powerline"]["derived"]["mains_hz"] == 60.0


def test_every_reference_beat_found_on_clean_demo_records(demo_run):
    out, _ = demo_run
    import wfdb
    table = pd.read_parquet(out / "beats.parquet")
    for rec in ("night01", "night02", "night03", "night04", "night06"):
        ann = wfdb.rdann(str(DEMO / rec), "atr")
        fs = TRUTH["records"][rec]["fs"]
        det = table[(table.record == rec) & ~table.reasons.str.contains("one_lead_only")].r_sample
        s = match_beats(det, ann.sample, fs)
        assert s.fn == 0 and s.fp == 0, (rec, s)
        # the synthetic generator places R exactly: refined R within 8 ms of truth
        err = np.abs(np.sort(det.to_numpy())[:, None] - ann.sample[None]).min(axis=1) / fs
        assert np.median(err) < 0.008, rec


def test_demo_faults_are_found_where_injected(demo_run):
    out, _ = demo_run
    table = pd.read_parquet(out / "beats.parquet")
    leads = pd.read_parquet(out / "leads.parquet")
    lead_off = leads[(leads.record == "night06") & (leads.lead == "V5")].iloc[0]
    assert not lead_off.used and "flat" in lead_off.reason
    assert leads[leads.record != "night06"].used.all()  # no clean lead rejected
    mask = np.load(out / "lead_mask.npy")
    kept = table[table.included]
    n6 = kept[kept.record == "night06"].tensor_index
    assert not mask[n6, 1].any() and mask[n6, 0].all()
    # lead II clipped in two stretches, V5 sound: those beats are kept with II masked (a
    # clipped lead is a fault of that lead, not of the heartbeat), and nowhere else
    t7 = kept[kept.record == "night07"]
    clipped = np.zeros(len(t7), bool)
    for f in TRUTH["records"]["night07"]["faults"]:
        clipped |= ((t7.r_sample >= f["start"] - 100) & (t7.r_sample <= f["end"] + 100)).to_numpy()
    masked = ~mask[t7.tensor_index.to_numpy(), 0]
    assert masked.any() and not (masked & ~clipped).any()
    assert mask[t7.tensor_index.to_numpy(), 1].all()
    assert t7["beat_flags"].to_numpy()[masked].astype(str).tolist() and all(
        "partial_leads" in f for f in t7["beat_flags"].to_numpy()[masked])
    # noisy stretches: excluded beats lie inside them, beats outside are kept
    for rec, reason in (("night05", "high_freq_noise"),):
        spans = [(f["start"], f["end"]) for f in TRUTH["records"][rec]["faults"]]
        t = table[table.record == rec]
        inside = np.zeros(len(t), bool)
        for a, b in spans:
            inside |= (t.r_sample >= a - 100).to_numpy() & (t.r_sample <= b + 100).to_numpy()
        hit = t.reasons.str.contains(reason).to_numpy()
        assert hit.any() and not (hit & ~inside).any(), rec
        assert t[~inside].included.mean() > 0.98, rec
    # ectopic beats are kept (flagged, not excluded): they are what anomaly models must see
    v = table[table.label == "V"]
    assert len(v) == TRUTH["records"]["night02"]["classes"]["V"] and v.included.all()


def test_same_inputs_same_bytes(demo_run, tmp_path):
    out, _ = demo_run
    again = tmp_path / "again"
    run([DEMO], again)
    for f in TENSOR_FILES + TABLE_FILES:
        assert (out / f).read_bytes() == (again / f).read_bytes(), f


def test_check_notices_corruption(demo_run, tmp_path):
    out, _ = demo_run
    bad = tmp_path / "bad"
    shutil.copytree(out, bad)
    data = bytearray((bad / "beats.npy").read_bytes())
    data[-1] ^= 0xFF
    (bad / "beats.npy").write_bytes(bytes(data))
    problems = check_dataset(bad)
    assert any("beats.npy" in p and "SHA-256" in p for p in problems)


def test_bad_record_among_good_ones(demo_copy, tmp_path):
    (demo_copy / "broken.hea").write_text("broken 2 250 45000\nbroken.dat 16 1000 16 0 0 0 0 II\n"
                                          "broken.dat 16 1000 16 0 0 0 0 V5\n")
    (demo_copy / "broken.dat").write_bytes(b"\x00" * 10)  # far shorter than declared
    (demo_copy / "night01.dat").unlink()                    # a missing signal file
    s = run([demo_copy], tmp_path / "out")
    assert s.exit_code == EXIT_SOME_FAILED
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet").set_index("record")
    assert rec.loc["night01", "status"] == "failed" and "night01.hea" in rec.loc["night01", "error"]
    assert rec.loc["broken", "status"] == "failed"
    assert (rec.drop(["night01", "broken"]).status == "ok").all()
    assert check_dataset(tmp_path / "out") == []


def test_no_usable_record(tmp_path):
    src = tmp_path / "rec"
    src.mkdir()
    import wfdb
    wfdb.wrsamp("flat", fs=250, units=["mV"], sig_name=["II"], p_signal=np.zeros((5000, 1)),
                fmt=["16"], adc_gain=[1000], baseline=[0], write_dir=str(src))
    s = run([src], tmp_path / "out")
    assert s.exit_code == EXIT_NONE_USABLE
    rec = pd.read_parquet(tmp_path / "out" / "records.parquet")
    assert rec.status.tolist() == ["no_usable_lead"] and "flat" in rec.error[0]


def test_output_folder_is_not_overwritten_by_accident(demo_run, tmp_path):
    from prep.errors import ConfigError
    out, _ = demo_run
    target = tmp_path / "exists"
    shutil.copytree(out, target)
    with pytest.raises(ConfigError, match="another configuration"):
        run([DEMO / "night01.hea"], target, config=Config().replace(resample={"n_samples": 128}))
    # same configuration, other records: a 7-record dataset is never replaced by a 1-record one
    # without --overwrite (docs/inputs.md)
    with pytest.raises(ConfigError, match="7 records made from other inputs"):
        run([DEMO / "night01.hea"], target)
    run([DEMO], target)  # same configuration and records: processed again in place
    (target / "report.html").write_text("<p>the 7-record dataset</p>")
    (tmp_path / "plain").mkdir()
    (tmp_path / "plain" / "x").write_text("x")
    with pytest.raises(ConfigError, match="not empty"):
        run([DEMO / "night01.hea"], tmp_path / "plain")
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    with pytest.raises(ConfigError, match="not a beatmill dataset"):
        run([DEMO / "night01.hea"], other, overwrite=True)
    s = run([DEMO / "night01.hea"], target, overwrite=True)
    assert s.n_records == 1
    assert not (target / "report.html").exists()  # it described the replaced dataset


def test_csv_input_with_sidecar(tmp_path):
    import wfdb
    r = wfdb.rdrecord(str(DEMO / "night01"))
    df = pd.DataFrame(r.p_signal, columns=r.sig_name)
    df.insert(0, "time", np.arange(len(df)) / r.fs)
    df["PLETH"] = 0.0
    df.to_csv(tmp_path / "patch.csv", index=False)
    (tmp_path / "patch.json").write_text('{"fs": 250}')
    s = run([tmp_path / "patch.csv"], tmp_path / "out")
    assert s.exit_code == EXIT_OK and s.axis == ["II", "V5"]
    leads = pd.read_parquet(tmp_path / "out" / "leads.parquet")
    assert "PLETH" in leads.lead.tolist() and "not ECG" in leads.set_index("lead").reason["PLETH"]


@pytest.mark.refdata
def test_real_records_with_non_ecg_channels_and_shared_axis(tmp_path):
    # PhysioNet/CinC Challenge 2015 record v102s: ECG II and V plus PLETH and RESP (skipped)
    base = ref_path("challenge2015", "v102s")
    s = run([str(base)], tmp_path / "out")
    leads = pd.read_parquet(tmp_path / "out" / "leads.parquet")
    skipped = leads[~leads.in_axis & ~leads.used]
    assert set(skipped.lead) == {"PLETH", "RESP"}
    assert s.axis == ["II", "V"]


@pytest.mark.refdata
def test_mitdb_100_keeps_its_reference_beats(tmp_path):
    # MIT-BIH 100 is clean: at least 99 % of its 2,273 reference beats are kept (issue floor)
    base = ref_path("mitdb", "100")
    run([str(base)], tmp_path / "out")
    t = pd.read_parquet(tmp_path / "out" / "beats.parquet")
    import wfdb
    ann = wfdb.rdann(str(base), "atr")
    from prep.model import BEAT_SYMBOLS
    ref = ann.sample[np.isin(ann.symbol, list(BEAT_SYMBOLS))]
    s = match_beats(t[t.included].r_sample, ref, 360.0)
    assert s.tp / ref.size >= 0.99
    assert (t.label != "").sum() >= 2270
