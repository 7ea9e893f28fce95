"""Parallel runs, shards, resume after a kill, and a real Dask LocalCluster."""
import io
import json
import os
import shutil
import signal
import subprocess
import sys
import time

import pytest

from prep.dataset.check import check_dataset
from prep.dataset.run import run
from prep.schema import TABLE_FILES, TENSOR_FILES

from ..conftest import DEMO, ROOT


def _bytes(d):
    return {f: (d / f).read_bytes() for f in TENSOR_FILES + TABLE_FILES}


def test_two_workers_same_bytes_as_one(demo_run, tmp_path):
    out1, _ = demo_run
    run([DEMO], tmp_path / "w2", workers=2)
    assert _bytes(out1) == _bytes(tmp_path / "w2")


def test_resume_reuses_only_unchanged_committed_shards(tmp_path, monkeypatch):
    src = tmp_path / "in"
    shutil.copytree(DEMO, src)
    out = tmp_path / "out"
    run([src], out)
    first = _bytes(out)
    import prep.dataset.run as D
    calls = []
    real = D._shard_task
    monkeypatch.setattr(D, "_shard_task", lambda t: calls.extend(s.name for s in t[0]) or
                        real(t))
    run([src], out)                              # same command: nothing redone
    assert calls == [] and _bytes(out) == first
    (src / "night03.atr").unlink()               # one input changed
    run([src], out)
    assert calls == ["night03"]
    # a shard whose files were tampered with is not trusted
    shard = next((out / ".shards").glob("night01-*"))
    entry = json.loads((shard / "COMMIT.json").read_text())["records"][0]
    data = bytearray((shard / "data.bin").read_bytes())
    at, length, _ = entry["files"]["beats.arrow"]
    data[at:at + length] = b"j" * length
    (shard / "data.bin").write_bytes(bytes(data))
    run([src], out)
    assert calls == ["night03", "night01"]
    assert check_dataset(out) == []


def test_different_config_refused_on_a_killed_run(tmp_path):
    from prep.config import Config
    from prep.errors import ConfigError
    out = tmp_path / "out"
    (out / ".shards").mkdir(parents=True)
    (out / ".shards" / "RUN.json").write_text(json.dumps({"config_sha256": "something else"}))
    with pytest.raises(ConfigError, match="another configuration"):
        run([DEMO / "night01.hea"], out, config=Config())


def test_sigkill_mid_run_then_resume_gives_the_same_dataset(demo_run, tmp_path):
    out, _ = demo_run
    target = tmp_path / "killed"
    code = ("import sys; from prep.dataset.run import run; "
            f"run([{str(DEMO)!r}], {str(target)!r}, workers=1)")
    env = {**os.environ, "BEATMILL_WORKERS": "1"}
    p = subprocess.Popen([sys.executable, "-c", code], cwd=ROOT, env=env)
    deadline = time.time() + 120
    while time.time() < deadline:       # kill once some shards are committed, before the end
        commits = list((target / ".shards").glob("*/COMMIT.json")) if target.exists() else []
        if len(commits) >= 2:
            break
        time.sleep(0.05)
    p.send_signal(signal.SIGKILL)
    p.wait()
    assert not (target / "manifest.json").exists() or check_dataset(target) == []
    run([DEMO], target)                  # same command again: resumes
    assert _bytes(target) == _bytes(out)
    assert check_dataset(target) == []


def test_dask_local_cluster_two_workers(demo_run, tmp_path):
    pytest.importorskip("distributed", reason="dask.distributed not installed (optional extra)")
    from dask.distributed import Client, LocalCluster
    out, _ = demo_run
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        assert len(client.scheduler_info()["workers"]) == 2
        run([DEMO], tmp_path / "dask", dask=cluster.scheduler_address,
            shards=str(tmp_path / "shared-shards"))
    assert _bytes(tmp_path / "dask") == _bytes(out)
    assert len(list((tmp_path / "shared-shards").glob("*/COMMIT.json"))) == 7


@pytest.mark.refdata
def test_chunked_and_unchunked_runs_agree():
    # MIT-BIH 100 (30 min) in 5-minute chunks against one piece
    from pathlib import Path

    import numpy as np

    from prep.config import Config
    from prep.io.sources import Source
    from prep.pipeline.chunks import beats_of_source, chunk_plan

    from ..conftest import ref_path
    base = ref_path("mitdb", "100")
    src = Source("wfdb", Path(base), "100")
    whole = beats_of_source(src, Config(), ["II", "V5"])
    cfg = Config().replace(chunks={"chunk_minutes": 5.0})
    assert len(chunk_plan(650000, 360.0, cfg)) == 7
    parts = beats_of_source(src, cfg, ["II", "V5"])
    a, b = whole.beats.set_index("r_sample"), parts.beats.set_index("r_sample")
    same = a.index.intersection(b.index)
    assert len(same) >= 0.995 * len(a) and abs(len(a) - len(b)) <= 2
    # the few others moved by a few samples (a chunk may pick its R from the other lead)
    rest = np.setdiff1d(a.index, same)
    near = [np.abs(b.index.to_numpy() - r).min() for r in rest]
    assert all(d <= 0.05 * 360 for d in near)
    assert (a.loc[same, "included"] == b.loc[same, "included"]).all()
    ka, kb = a.loc[same][a.loc[same].included], b.loc[same][b.loc[same].included]
    np.testing.assert_allclose(whole.tensor[ka.tensor_index], parts.tensor[kb.tensor_index],
                               atol=1e-4)
    assert (whole.windows.grade.to_numpy() == parts.windows.grade.to_numpy()).mean() >= 0.95


def test_robust_dataset_statistics_exact_without_holding_values(monkeypatch):
    # Reference: numpy.percentile (default linear interpolation) over all unmasked values.
    # The interval narrowing is forced to run several passes by a tiny exact-gather limit.
    import numpy as np

    from prep.dataset import stats as ds
    monkeypatch.setattr(ds, "_EXACT", 40)
    rng = np.random.default_rng(7)
    batches = []
    for n in (50, 1, 300, 17):
        b = rng.normal(0, 1, (n, 2, 16))
        b[:, 1] = np.round(b[:, 1], 1)  # many ties on lead 1
        b[: n // 3, 0, :4] = 2.5        # a repeated value on lead 0
        batches.append((b, rng.random((n, 2)) > 0.2))
    c, s = ds.lead_stats("robust", 2, lambda: iter(batches))
    for j in range(2):
        v = np.concatenate([b[m[:, j], j].ravel() for b, m in batches])
        q1, q2, q3 = np.percentile(v, [25, 50, 75])
        assert c[j] == pytest.approx(q2, abs=1e-12)
        assert s[j] == pytest.approx(q3 - q1, abs=1e-12)


def test_streamed_table_rows_equal_one_concatenated_table(tmp_path):
    # Reference: pandas.concat of the same frames, written by pyarrow in one go.
    import pandas as pd

    from prep.dataset.sinks import ParquetRows
    frames = [pd.DataFrame({"a": [i, i + 1], "b": [f"x{i}", None], "c": [0.5 * i, None]})
              for i in range(7)] + [pd.DataFrame({"a": [], "b": [], "c": []})]
    sink = ParquetRows(tmp_path / "t.parquet", group=3)  # several row groups
    for f in frames:
        sink.add(f)
    sink.finish(frames[-1])
    import pyarrow.parquet as pq
    assert pq.ParquetFile(tmp_path / "t.parquet").metadata.num_row_groups > 1
    got = pd.read_parquet(tmp_path / "t.parquet")
    want = pd.concat(frames[:-1], ignore_index=True)
    pd.testing.assert_frame_equal(got, want, check_dtype=False)


def test_consolidation_reads_tables_from_shards_only_when_visited(demo_run):
    # The run keeps no record's beat table in memory: read_shard(tables=False) leaves them on
    # storage, and the dataset it assembles matches one assembled from in-memory tables.
    import pandas as pd

    from prep.config import Config
    from prep.dataset.assemble import Provenance, assemble
    from prep.dataset.run import resolve_extras
    from prep.dataset.shards import read_shard
    from prep.dataset.view import open_dataset
    from prep.io.sources import find_sources
    out, _ = demo_run
    root = out / ".shards"
    man = json.loads((out / "manifest.json").read_text())
    commits = {e["record"]: c for c in (json.loads(p.read_text())
                                        for p in root.glob("*/COMMIT.json"))
               for e in c["records"]}
    found, _ = find_sources([DEMO])
    lazy, full = [], []
    for s in found:
        key = commits[s.name]["config_sha256"]
        lazy.append(read_shard(str(root), s.name, key, None, tables=False))
        full.append(read_shard(str(root), s.name, key, None))
    assert all(r.beats is None and r.windows is None for r in lazy)
    assert [r.n_beats for r in lazy] == [r.n_beats for r in full]
    cfg = Config()
    mapping, pmap, extra = resolve_extras(cfg)
    args = (cfg, man["lead_axis"], Provenance([], [], mapping, pmap, extra))
    a = assemble(full, *args)
    ds = open_dataset(out)
    pd.testing.assert_frame_equal(a.table.reset_index(drop=True), ds.table, check_dtype=False)
    assert (a.beats == ds.beats).all()
    # The shards' kept-beat summaries (which spare the first passes a table read) agree with
    # the tables, also where split rules drop beats (train_classes; a patient in no fixed list)
    # and for a shard written before summaries existed (kept=None: the tables are read).
    assert all(r.store.kept["in_order"] for r in lazy)
    for c in (cfg.replace(labels={"train_classes": ["N"]}, normalize={"scope": "dataset"}),
              cfg.replace(split={"train_patients": ["night01"], "test_patients": ["night02"]})):
        want = assemble(full, c, *args[1:])
        for kept in ("summary", None):
            for r in lazy:
                r.store.kept = r.store.kept if kept else None
            got = assemble(lazy, c, *args[1:])
            pd.testing.assert_frame_equal(got.table, want.table)
            assert (got.beats == want.beats).all() and got.manifest == want.manifest
        assert (want.table.reasons.str.contains("not_").any())  # the rules did drop beats


def test_kept_summary_and_rule_shortcut_agree_with_the_rules():
    import numpy as np
    import pandas as pd

    from prep.dataset.plan import rule_reasons, rules_apply
    from prep.dataset.shards import kept_summary
    b = pd.DataFrame({"included": [True, False, True, True], "beat_class": ["N", "V", None, "V"],
                      "r_sample": [10, 20, 30, 40], "tensor_index": [0, -1, 1, 2]})
    got = kept_summary(b)
    assert got["in_order"] and dict(map(tuple, got["classes"])) == {"N": 1, None: 1, "V": 1}
    assert not kept_summary(b.assign(tensor_index=[1, -1, 0, 2]))["in_order"]
    assert not kept_summary(b.assign(r_sample=[10, 20, 50, 40]))["in_order"]
    assert kept_summary(None) == {"classes": [], "in_order": True}
    for split in ("", "train", "val", "test"):
        for fixed in (False, True):
            for tc in (set(), {"N"}):
                extra = rule_reasons(b, split, fixed, tc)
                if not rules_apply(split, fixed, tc):  # the shortcut skips no exclusion
                    assert (extra == "").all()
                assert np.isin(extra, ["", "not_in_split_lists", "not_train_class"]).all()


@pytest.mark.refdata
def test_edf_record_in_chunks_agrees_with_one_piece(tmp_path):
    # MIT-BIH 100, first 12 minutes, written as EDF+C with its beat labels by pyedflib (the
    # reference EDF library), run in 3-minute chunks against one piece.
    pyedflib = pytest.importorskip("pyedflib")
    import wfdb

    from prep.config import Config
    from prep.io.sources import Source, record_length
    from prep.pipeline.chunks import beats_of_source

    from ..conftest import ref_path
    n = 12 * 60 * 360
    r = wfdb.rdrecord(str(ref_path("mitdb", "100")), sampto=n)
    a = wfdb.rdann(str(ref_path("mitdb", "100")), "atr", sampto=n)
    path = tmp_path / "night.edf"
    heads = [{"label": lab, "dimension": "uV", "sample_frequency": 360, "physical_max": 10000,
              "physical_min": -10000, "digital_max": 32767, "digital_min": -32768,
              "transducer": "", "prefilter": ""} for lab in ("ECG II", "ECG V5")]
    with pyedflib.EdfWriter(str(path), 2, file_type=pyedflib.FILETYPE_EDFPLUS) as f:
        f.set_number_of_annotation_signals(4)
        f.setSignalHeaders(heads)
        f.writeSamples([r.p_signal[:, 0] * 1000, r.p_signal[:, 1] * 1000])
        for s, y in zip(a.sample, a.symbol):
            f.writeAnnotation(s / 360.0, -1, y)
    src = Source("edf", path, "night")
    assert record_length(src) == (n, 360.0)
    whole = beats_of_source(src, Config(), ["II", "V5"])
    parts = beats_of_source(src, Config().replace(chunks={"chunk_minutes": 3.0}), ["II", "V5"])
    assert [lg.counts for lg in parts.logs if lg.stage == "chunks"] == [{"chunks": 4}]
    wa, wb = whole.beats.set_index("r_sample"), parts.beats.set_index("r_sample")
    same = wa.index.intersection(wb.index)
    assert len(same) >= 0.995 * len(wa) and abs(len(wa) - len(wb)) <= 2
    assert (wa.loc[same, "label"] == wb.loc[same, "label"]).all()  # annotations shifted right
    assert (wb["label"] != "").mean() >= 0.99
    assert (wa.loc[same, "included"] == wb.loc[same, "included"]).mean() >= 0.995


def test_npy_writer_hashes_in_order_writes_and_matches_numpy(tmp_path):
    # The written file loads with numpy.load (the reference reader of the .npy format) as the
    # array written; its SHA-256 (hashlib over the file) is known without a read-back only
    # when every row came once, in order.
    import hashlib

    import numpy as np

    from prep.dataset.export import NpyWriter
    x = np.random.default_rng(0).normal(size=(10, 2, 5)).astype(np.float32)
    w = NpyWriter(tmp_path / "a.npy", x.shape, np.float32)
    for i in range(0, 10, 3):
        w[i:i + 3] = x[i:i + 3]
    w.close()
    assert np.array_equal(np.load(tmp_path / "a.npy"), x)
    assert w.sha256 == hashlib.sha256((tmp_path / "a.npy").read_bytes()).hexdigest()
    m = NpyWriter(tmp_path / "m.npy", (4, 3), np.bool_)
    m[2:4], m[0:2] = np.ones((2, 3), bool), np.zeros((2, 3), bool)  # out of order
    m.close()
    assert m.sha256 is None and np.load(tmp_path / "m.npy")[2:].all()
    p = NpyWriter(tmp_path / "p.npy", (4, 3), np.float32)
    p[0:2] = np.ones((2, 3))  # rows 2-3 never written
    p.close()
    assert p.sha256 is None


def test_streamed_manifest_section_writes_the_same_text_as_json_dumps(tmp_path):
    # A per-record section given as a lazy Mapping is written entry by entry; the file must be
    # the text json.dumps(indent=2) gives for the equivalent dict (Python's json module is the
    # reference), NaN written as null as elsewhere in the manifest.
    from collections.abc import Mapping

    from prep.dataset.export import write_manifest

    class Lazy(Mapping):
        def __init__(self, d):
            self.d = d

        def __getitem__(self, k):
            return self.d[k]

        def __iter__(self):
            return iter(self.d)

        def __len__(self):
            return len(self.d)

    recs = {"night01": {"status": "ok", "stages": [{"stage": "gaps", "counts": {"n": 1}}]},
            "nacht-\u00e9": {"status": "failed", "error": "line\nbreak", "x": float("nan")}}
    plain = {"tool": {"name": "beatmill"}, "records": recs, "empty": {}, "files": {"a": "b"}}
    lazy = {**plain, "records": Lazy(recs), "empty": Lazy({})}
    write_manifest(tmp_path / "plain.json", plain)
    write_manifest(tmp_path / "lazy.json", lazy)
    want = json.dumps({**plain, "records": {**recs, "nacht-\u00e9": {**recs["nacht-\u00e9"],
                                                                     "x": None}}},
                      indent=2, ensure_ascii=False) + "\n"
    assert (tmp_path / "plain.json").read_text(encoding="utf-8") == want
    assert (tmp_path / "lazy.json").read_text(encoding="utf-8") == want


@pytest.mark.skipif(not os.path.exists("/proc/self/maps"), reason="needs Linux /proc")
def test_lazy_shards_hold_no_memory_map(demo_run):
    # Each record read for consolidation keeps its tensor on disk: no kernel mapping of any
    # shard file stays open (Linux lists them in /proc/self/maps), and rows read through it
    # equal numpy.load's.
    import numpy as np

    from prep.dataset.shards import read_shard
    out, _ = demo_run
    root = out / ".shards"
    commits = {p.parent.name: json.loads(p.read_text()) for p in root.glob("*/COMMIT.json")}
    got = {f: [read_shard(str(root), e["record"], c["config_sha256"], None, tables=False)
               for e in c["records"]] for f, c in commits.items()}
    assert str(root) not in open("/proc/self/maps").read()
    for f, c in commits.items():
        data = (root / f / "data.bin").read_bytes()
        for r, e in zip(got[f], c["records"]):
            at, length, _ = e["files"]["tensor.npy"]
            ref = np.load(io.BytesIO(data[at:at + length]))
            assert r.tensor.shape == ref.shape and np.array_equal(r.tensor[[0, 2]], ref[[0, 2]])
    assert str(root) not in open("/proc/self/maps").read()


def test_parallel_runs_start_the_largest_records_first(tmp_path):
    # Longest-processing-time-first is the classic list-scheduling rule (Graham, 1969, from
    # memory): a long record taken last would leave the other workers idle. Input size stands
    # in for processing time; equal sizes keep the input order.
    from prep.dataset.run import _input_sizes, _largest_first
    from prep.io.sources import Source
    sizes = {"a": 10, "b": 300, "c": 10, "d": 50}
    found, inputs = [], []
    for name, n in sizes.items():
        (tmp_path / f"{name}.dat").write_bytes(b"x" * n)
        (tmp_path / f"{name}.hea").write_text("h")
        found.append(Source("wfdb", tmp_path / name, name))
        inputs.append([(f"{name}.hea", "-"), (f"{name}.dat", "-"), ("gone.atr", "-")])
    got = _input_sizes([0, 1, 2, 3], found, inputs)
    assert got == {0: 11, 1: 301, 2: 11, 3: 51}   # the header's byte counts too; gone.atr: 0
    assert _largest_first([0, 1, 2, 3], got) == [1, 3, 0, 2]
    assert _largest_first([2, 0], got) == [2, 0]


def test_short_records_are_batched_large_ones_are_not():
    from prep.dataset.run import MAX_BATCH, SMALL_RECORD_BYTES, _batches
    big, small = SMALL_RECORD_BYTES + 1, 120_000
    sizes = {0: big, 1: small, 2: small, 3: big, **{i: small for i in range(4, 404)}}
    got = _batches(list(sizes), sizes, workers=2)
    assert got[:2] == [[0], [3]]                       # one task per large record, first
    rest = got[2:]
    assert [i for b in rest for i in b] == [1, 2] + list(range(4, 404))   # order kept, all once
    assert len(rest) >= 16 and max(map(len, rest)) <= MAX_BATCH   # >= 8 batches per worker
    assert _batches([1, 2], sizes, workers=2) == [[1], [2]]
    many = {i: small for i in range(20_000)}
    assert max(map(len, _batches(list(many), many, workers=2))) == MAX_BATCH
    assert _batches([], {}, workers=2) == []


def test_batched_shards_same_bytes_resume_and_tamper(demo_run, tmp_path, monkeypatch):
    # Short records processed in batches write one shard folder per batch; the dataset is the
    # same bytes; a resumed run reuses every record; a record whose files in a batch's data
    # file were altered is redone alone, its batch mates are reused.
    import prep.dataset.run as D
    out1, _ = demo_run
    monkeypatch.setattr(D, "MAX_BATCH", 3)
    calls = []
    real = D._shard_task
    monkeypatch.setattr(D, "_shard_task", lambda t: calls.append([s.name for s in t[0]]) or
                        real(t))
    out = tmp_path / "b"
    monkeypatch.setattr(D, "_batches", lambda todo, sizes, workers: [todo[k:k + 3] for k in
                                                                      range(0, len(todo), 3)])
    run([DEMO], out, workers=1)
    assert _bytes(out) == _bytes(out1) and check_dataset(out) == []
    assert [len(c) for c in calls] == [3, 3, 1]
    folders = sorted(p.parent.name for p in (out / ".shards").glob("*/COMMIT.json"))
    assert len(folders) == 3 and sum(f.startswith("batch-") for f in folders) == 2
    calls.clear()
    run([DEMO], out, workers=1)
    assert calls == [] and _bytes(out) == _bytes(out1)
    # alter one byte of the second record's beat table inside the first batch's data file
    batch = next(f for f in folders if f.startswith("batch-"))
    commit = json.loads((out / ".shards" / batch / "COMMIT.json").read_text())
    victim = commit["records"][1]
    off = victim["files"]["beats.arrow"][0] + 100
    data = bytearray((out / ".shards" / batch / "data.bin").read_bytes())
    data[off] ^= 0xFF
    (out / ".shards" / batch / "data.bin").write_bytes(bytes(data))
    run([DEMO], out, workers=1)
    assert calls == [[victim["record"]]] and _bytes(out) == _bytes(out1)


def test_shards_on_an_fsspec_store(demo_run, tmp_path, monkeypatch):
    # A shard root given as an fsspec URL (here fsspec's in-memory store, standing in for an
    # object store a cluster shares) is read through the store, not through memory maps: the
    # dataset is the same bytes, batches included, and a second run reuses every record.
    pytest.importorskip("fsspec")
    import fsspec

    import prep.dataset.run as D
    out1, _ = demo_run
    monkeypatch.setattr(D, "_batches", lambda todo, sizes, workers: [todo[k:k + 4] for k in
                                                                      range(0, len(todo), 4)])
    url = f"memory://beatmill-{os.getpid()}-{tmp_path.name}"
    try:
        s = run([DEMO], tmp_path / "m", workers=1, shards=url)
        assert _bytes(tmp_path / "m") == _bytes(out1) and s.n_reused == 0
        fs = fsspec.filesystem("memory")
        assert len(fs.glob(url.removeprefix("memory:/") + "/*/COMMIT.json")) == 2
        again = run([DEMO], tmp_path / "m", workers=1, shards=url)
        assert again.n_reused == 7 and _bytes(tmp_path / "m") == _bytes(out1)
    finally:
        fsspec.filesystem("memory").rm(url, recursive=True)
