"""The Python API: in-memory processing, the read-only dataset view, the torch adapter."""
import runpy
import sys

import numpy as np
import pandas as pd
import pytest

import prep
from prep.io.wfdb import read_wfdb

from ..conftest import DEMO, ROOT


def test_public_names():
    assert set(prep.__all__) >= {"process", "run", "open_dataset", "Config", "Dataset"}
    for name in prep.__all__:
        assert getattr(prep, name) is not None
    with pytest.raises(AttributeError):
        prep.nothing_here


def test_process_equals_run_on_the_same_record(tmp_path):
    rec = read_wfdb(DEMO / "night02")
    mem = prep.process(rec.signals, rec.fs, leads=rec.lead_names, name="night02",
                       annotations=rec.annotations)
    prep.run([DEMO / "night02.hea"], tmp_path / "r")
    disk = prep.open_dataset(tmp_path / "r")
    np.testing.assert_array_equal(mem.beats, np.asarray(disk.beats))
    np.testing.assert_array_equal(mem.lead_mask, np.asarray(disk.lead_mask))
    np.testing.assert_array_equal(mem.norm_scale, np.asarray(disk.norm_scale))
    pd.testing.assert_frame_equal(mem.table.reset_index(drop=True), disk.table)
    cols = ["record", "status", "n_beats", "n_kept", "patient", "split"]
    pd.testing.assert_frame_equal(mem.records[cols], disk.records[cols])
    assert mem.manifest["records"]["night02"]["stages"] == disk.manifest["records"]["night02"]["stages"]


def test_open_dataset_round_trip_and_explain(demo_run):
    out, _ = demo_run
    ds = prep.open_dataset(out)
    assert isinstance(ds.beats, np.memmap) and ds.lead_axis == ["II", "V5"]
    total = 0
    for name in ("train", "val", "test"):
        view, rows = ds.split(name)
        assert isinstance(view, np.memmap) and len(view) == len(rows)
        assert (rows.split == name).all()
        total += len(view)
    assert total == ds.beats.shape[0]
    bad = ds.table[ds.table.reasons.str.contains("high_freq_noise")].beat_id.iloc[0]
    e = ds.explain(bad)
    r = [x for x in e["reasons"] if x["code"] == "high_freq_noise"][0]
    assert r["score"] > r["threshold"] == 0.1 and not e["included"]
    with pytest.raises(prep.BeatmillError, match="no beat"):
        ds.explain("nope:1")


def test_config_api_messages_match_cli():
    with pytest.raises(prep.ConfigError, match="'order' parameter of \\[bandpass\\] must be <= 8"):
        prep.Config().replace(bandpass={"order": 20})
    text = prep.Config().to_toml()
    assert prep.Config.from_dict(__import__("tomllib").loads(text)) == prep.Config()


def test_worked_example_runs_and_finds_the_ectopic_beats(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(ROOT)
    monkeypatch.setattr(sys, "argv", ["anomaly_demo.py", str(tmp_path / "ex")])
    g = runpy.run_path(str(ROOT / "docs" / "examples" / "anomaly_demo.py"), run_name="__main__")
    assert "beat_id" in capsys.readouterr().out
    # the demo's ventricular beats are the least normal test beats
    assert (g["TOP_CLASSES"] == "V").mean() >= 0.8


def test_torch_adapter_with_dataloader_workers(demo_run):
    torch = pytest.importorskip("torch", reason="PyTorch not installed (optional extra)")
    from torch.utils.data import DataLoader

    from prep.torch import BeatDataset
    out, _ = demo_run
    ds = BeatDataset(out, split="train")
    beat, mask, label = ds[0]
    assert beat.dtype == torch.float32 and beat.shape == (2, 256) and mask.dtype == torch.bool
    assert ds.class_names[label] in ("N", "S", "V", "unlabeled")
    # shares memory with the mapped file: no copy was made
    raw = np.load(out / "beats.npy", mmap_mode="r")
    a, _ = prep.open_dataset(out).manifest["splits"]["train"]["rows"]
    np.testing.assert_array_equal(beat.numpy(), raw[a])
    assert not beat.numpy().flags.owndata
    seen = 0
    for b, m, y in DataLoader(ds, batch_size=64, num_workers=2):
        seen += len(b)
    assert seen == len(ds)
