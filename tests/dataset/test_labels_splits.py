"""Labels, AAMI classes and patient-wise splits."""
import json

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from prep.config import Config
from prep.dataset.check import check_dataset
from prep.dataset.run import run
from prep.dataset.split import SPLITS, assign_patients, fixed_assignment, patient_of
from prep.model import BEAT_SYMBOLS, Annotations
from prep.stages.labels import AAMI_CLASSES, beat_classes, load_mapping, noise_stretches, rhythm_at

from ..conftest import DEMO, ref_path


def test_aami_table():
    # ANSI/AAMI EC57 as reproduced in many papers; B, n, r, ? from memory (the table)
    want = {"N": "NLRejB", "S": "AaJSn", "V": "VEr", "F": "F", "Q": "/fQ?"}
    for cls, syms in want.items():
        for s in syms:
            assert AAMI_CLASSES[s] == cls
    assert set(AAMI_CLASSES) == set(BEAT_SYMBOLS)


@pytest.mark.refdata
def test_mitdb_100_class_counts(tmp_path):
    # check value from the issue, counted from 100.atr: N 2239, S 33, V 1
    import wfdb
    base = ref_path("mitdb", "100")
    a = wfdb.rdann(str(base), "atr")
    cls = beat_classes(np.array([s for s in a.symbol if s in BEAT_SYMBOLS], dtype=object))
    assert {c: int((cls == c).sum()) for c in ("N", "S", "V")} == {"N": 2239, "S": 33, "V": 1}
    # and the kept beats of a run carry the same counts as the reference beats they match
    run([str(base)], tmp_path / "out")
    t = pd.read_parquet(tmp_path / "out" / "beats.parquet")
    kept = t[t.included]
    counts = kept["beat_class"].value_counts().to_dict()
    assert counts["S"] == 33 and counts["V"] == 1 and counts["N"] >= 2239 - 5
    assert kept.rhythm.eq("N").all()


def test_rhythm_and_noise_annotations():
    ann = Annotations(np.array([10, 500, 1000, 2000]), np.array(["+", "~", "~", "+"], dtype=object),
                      aux=np.array(["(N\x00", "", "", "(AFIB"], dtype=object),
                      subtype=np.array([0, 2, 0, 0]))
    assert rhythm_at(np.array([5, 100, 2500]), ann).tolist() == ["", "N", "AFIB"]
    noisy = noise_stretches(ann, 3000, [0, 1])
    assert not noisy[0].any()  # subtype 2: only signal 1 is noisy
    assert noisy[1, 500:1000].all() and not noisy[1, 1000:].any()


def test_custom_mapping_files(tmp_path):
    (tmp_path / "m.toml").write_text('[classes]\n"X" = "V"\n')
    (tmp_path / "m.csv").write_text("symbol,class\nX,S\n")
    assert load_mapping(str(tmp_path / "m.toml")) == {"X": "V"}
    assert beat_classes(np.array(["X", "N"], dtype=object), load_mapping(str(tmp_path / "m.csv"))
                        ).tolist() == ["S", "N"]


def test_patient_sources():
    assert patient_of("r1", [], {"r1": "P1"}, "") == "P1"
    assert patient_of("r2", ["Patient: 42"], {}, r"Patient: (\d+)") == "42"
    assert patient_of("r3", ["nothing"], {}, r"Patient: (\d+)") == "r3"


layouts = st.dictionaries(st.text("abcdefgh", min_size=1, max_size=4),
                          st.dictionaries(st.sampled_from(["N", "S", "V", "unlabeled"]),
                                          st.integers(0, 500), min_size=1),
                          min_size=1, max_size=30)


@settings(max_examples=200, deadline=None)
@given(layouts, st.lists(st.floats(0, 1), min_size=3, max_size=3).filter(lambda r: sum(r) > 0),
       st.integers(0, 2**32 - 1))
def test_split_property_every_patient_once_and_reproducible(counts, ratios, seed):
    a = assign_patients(counts, ratios, seed)
    assert set(a) == set(counts)                 # every patient in exactly one split
    assert set(a.values()) <= set(SPLITS)
    assert assign_patients(counts, ratios, seed) == a
    for s, r in zip(SPLITS, ratios):
        if r == 0:
            assert s not in a.values()


def test_split_ratios_are_approached_with_many_patients():
    rng = np.random.default_rng(0)
    counts = {f"p{i}": {"N": int(rng.integers(100, 3000)), "V": int(rng.integers(0, 200))}
              for i in range(100)}
    a = assign_patients(counts, [0.7, 0.15, 0.15], 0)
    tot = sum(sum(v.values()) for v in counts.values())
    share = {s: sum(sum(counts[p].values()) for p in a if a[p] == s) / tot for s in SPLITS}
    assert share["train"] == pytest.approx(0.7, abs=0.02)
    assert share["val"] == pytest.approx(0.15, abs=0.02)


def test_fixed_lists():
    a = fixed_assignment(["a", "b", "c"], ["a"], ["b"], [])
    assert a == {"a": "train", "b": "val", "c": ""}


def test_run_with_train_classes_patients_and_dataset_norm(tmp_path):
    pm = tmp_path / "patients.csv"
    pm.write_text("record,patient\nnight01,V1\nnight02,V1\nnight03,V2\nnight04,V3\n"
                  "night05,V4\nnight06,V5\nnight07,V6\n")
    cfg = Config().replace(labels={"train_classes": ["N"]},
                           split={"patient_map": str(pm), "train_patients": ["V1", "V2", "V3"],
                                  "val_patients": ["V4"], "test_patients": ["V5"]},
                           normalize={"scope": "dataset"})
    s = run([DEMO], tmp_path / "out", config=cfg)
    out = tmp_path / "out"
    assert check_dataset(out) == []
    t = pd.read_parquet(out / "beats.parquet")
    m = json.loads((out / "manifest.json").read_text())
    assert m["tensor"]["normalization"]["statistics_from"] == "the training split, per lead"
    tr = t[t.split == "train"]
    # night02's ventricular and atrial beats are training beats of other classes: excluded
    assert not tr[tr["beat_class"] != "N"].included.any()
    assert tr[tr["beat_class"] != "N"].reasons.str.contains("not_train_class").all()
    n7 = t[t.record == "night07"]
    assert not n7.included.any() and (n7.reasons == "not_in_split_lists").sum() > 150
    x = np.load(out / "beats.npy", mmap_mode="r")
    a, b = m["splits"]["train"]["rows"]
    kept = t[t.included].sort_values("tensor_index")
    assert (kept.split.iloc[a:b] == "train").all() and b - a == (kept.split == "train").sum()
    # statistics from the training split: its beats have mean ~0 per lead over the split
    assert abs(float(np.asarray(x[a:b, 0]).mean())) < 1e-3
    assert s.splits["test"]["patients"] == ["V5"]


def test_same_seed_same_split_and_check_catches_leakage(demo_run, tmp_path):
    out, _ = demo_run
    again = run([DEMO], tmp_path / "again")
    a = pd.read_parquet(out / "records.parquet")[["record", "split"]]
    b = pd.read_parquet(tmp_path / "again" / "records.parquet")[["record", "split"]]
    assert a.equals(b)
    # forge a leak: give two records of different splits the same patient, re-hash, check
    import shutil

    from prep.dataset.export import write_parquet
    from prep.io._files import sha256_file as sha256_path
    bad = tmp_path / "leak"
    shutil.copytree(out, bad)
    t = pd.read_parquet(bad / "beats.parquet")
    recs = pd.read_parquet(bad / "records.parquet")
    r1, r2 = recs[recs.split == "train"].record.iloc[0], recs[recs.split == "test"].record.iloc[0]
    t.loc[t.record == r2, "patient"] = t.loc[t.record == r1, "patient"].iloc[0]
    write_parquet(bad / "beats.parquet", t)
    m = json.loads((bad / "manifest.json").read_text())
    m["files"]["beats.parquet"] = sha256_path(bad / "beats.parquet")
    (bad / "manifest.json").write_text(json.dumps(m))
    assert any("more than one split" in p for p in check_dataset(bad))
