"""``run``: read sources, process every record, and write one dataset folder."""
from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from prep import __version__
from prep.config import Config
from prep.errors import ConfigError
from prep.dataset.export import (MANIFEST, TABLE_FILES, TENSOR_FILES, NpyWriter, environment,
                     write_manifest, write_npy, write_parquet)
from prep.leads import default_axis, resolve_axis
from prep.quality import reasons as reasons_mod
from prep.stages.labels import AAMI_CLASSES, UNLABELED, load_mapping
from prep.stages.normalize import apply_stats, normalize
from prep.pipeline.record import RecordResult
from prep.schema import BEAT_COLUMNS, BEAT_TYPES, empty_beats
from prep.dataset.split import SPLITS, assign_patients, fixed_assignment, load_patient_map, patient_of
from prep.io._files import sha256_file
from prep.io.read import Source, find_sources, read_source, source_inputs
from prep.dataset.shards import kept_summary, read_shard, write_shard

log = logging.getLogger("prep")

#: Exit codes shared by every command (README: "Exit codes").
EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, EXIT_NONE_USABLE = 0, 1, 2, 3


@dataclass
class RunSummary:
    out: Path
    n_records: int
    n_failed: int
    n_no_lead: int
    n_beats: int
    n_kept: int
    axis: list[str]
    exit_code: int
    splits: dict | None = None
    class_yield: dict | None = None   # the manifest's class_yield section


def _peek_leads(src: Source, cfg: Config) -> list[str] | None:
    """Canonical ECG leads of a source, reading only its header when possible."""
    if src.kind == "wfdb":
        try:
            import wfdb

            from prep.leads import canonical_lead, classify_channel
            h = wfdb.rdheader(str(src.path))
            if not h.sig_name:  # a multi-segment header names no signal: read the record
                return read_source(src, cfg.read).leads
            names = h.sig_name
            units = h.units or [""] * len(names)
            return [canonical_lead(n) for n, u in zip(names, units) if classify_channel(n, u)[0]]
        except Exception:
            return None
    try:
        return read_source(src, cfg.read).leads
    except Exception:
        return None


def run(sources: list[str | Path], out: str | Path, *, config: Config | None = None,
        overwrite: bool = False, csv_fs: float | None = None,
        progress: Callable[[RecordResult, int, int], None] | None = None,
        workers: int | None = None, shards: str | None = None,
        dask: str | None = None) -> RunSummary:
    """Process records and write the dataset folder ``out`` (what ``beatmill run`` does).

    Parameters
    ----------
    workers : int, optional
        Parallel processes (default: ``$BEATMILL_WORKERS``, else every core). Outputs are the
        same byte for byte for any number.
    shards : str, optional
        Where per-record shards go (a folder or an fsspec URL; default ``OUT/.shards``).
        Re-running the same command reuses committed shards whose inputs are unchanged.
    dask : str, optional
        A dask.distributed scheduler address, or ``"local"`` for a LocalCluster with one worker
        process per core; records are then processed as cluster tasks.

    Raises :class:`ConfigError` for problems found before any record is read (bad config, no
    input found, output folder in the way). Record failures never raise: they are reported in
    ``records.parquet`` and the summary's exit code.
    """
    cfg = (config or Config()).validate()
    if csv_fs:
        cfg = cfg.replace(read={"csv_fs_hz": float(csv_fs)})
    out = Path(out)
    mapping, pmap, extra = _resolve_extras(cfg)
    found, problems = find_sources(list(sources))
    if not found:
        raise ConfigError(problems or ["no input records given"])
    for p in problems:
        log.warning("%s", p)
    chash = cfg.sha256(extra)
    root = str(shards) if shards else str(out / ".shards")
    _prepare_out(out, overwrite, chash)
    # workers start (and warm up) while the parent reads headers and hashes the inputs
    n_pool = min(_n_workers(workers), len(found))
    pool = _start_pool(n_pool) if not dask and n_pool > 1 else None
    try:
        axis, inputs = _axis_and_inputs(found, cfg)
    except BaseException:
        if pool is not None:
            pool.shutdown(cancel_futures=True)
        raise
    key = _shard_hash(json.dumps({"config": chash, "axis": axis}))
    results: list = [None] * len(found)
    todo = []
    done = 0
    for i, src in enumerate(found):
        cached = read_shard(root, src.name, key, inputs[i], tables=False)
        if cached is None:
            todo.append(i)
        else:
            results[i] = cached
            done += 1
            if progress:
                progress(cached, done, len(found))
    if len(found) - len(todo):
        log.info("reusing %d committed shards", len(found) - len(todo))
    if dask or pool is not None:
        todo = _largest_first(todo, found, inputs)
    tasks = [(found[i], cfg, axis, mapping, root, key, inputs[i]) for i in todo]
    for i, error in zip(todo, _execute(tasks, workers, dask, pool)):
        done += 1
        res = read_shard(root, found[i].name, key, inputs[i], tables=False)
        if res is None:  # the worker died before committing: report, never trust half a shard
            res = RecordResult(found[i].name, "failed", error=error or "the worker processing "
                               "this record stopped before writing its results")
        if res.status == "failed":
            log.warning("%s: %s", res.name, res.error)
        results[i] = res
        if progress:
            progress(res, done, len(found))
    staging = out / f".staging-{os.getpid()}"
    shutil.rmtree(staging, ignore_errors=True)
    try:
        staging.mkdir(parents=True)

        def alloc(name, shape, dtype):
            if int(np.prod(shape)) == 0:
                return np.zeros(shape, dtype)
            return NpyWriter(staging / name, shape, dtype)

        a = assemble(results, cfg, axis, [str(s) for s in sources], [str(s.path) for s in found],
                     mapping, pmap, extra, alloc=alloc, tables_to=staging)
        write_assembled(staging, a)
        _swap_in(staging, out)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return _summary(out, a)


def _axis_and_inputs(found: list[Source], cfg: Config) -> tuple[list[str], list]:
    """The lead axis (from the config or the records' headers) and each source's input files
    with their SHA-256 (a committed shard is reused only for unchanged inputs)."""
    if cfg.leads.select:
        axis = resolve_axis(cfg.leads.select)
    else:
        peeks = [lp for lp in (_peek_leads(s, cfg) for s in found) if lp]
        axis = default_axis(peeks)
        if not axis:
            raise ConfigError("the records share no ECG lead; choose the lead axis with --leads "
                              "(for example --leads II)")
    return axis, [_inputs_or_empty(s, cfg) for s in found]


def _largest_first(todo: list[int], found: list[Source], inputs: list) -> list[int]:
    """Record indices ordered by the size of their input files, largest first (ties keep the
    input order). Parallel workers then take long records early: a 24-hour record started last
    would leave every other worker idle while it runs. The dataset does not depend on this
    order."""
    def size(i: int) -> int:
        total = 0
        for name, _ in inputs[i]:
            try:
                total += (found[i].path.parent / name).stat().st_size
            except OSError:
                pass
        return total
    return sorted(todo, key=lambda i: -size(i))


def _shard_hash(key: str) -> str:
    return hashlib.sha256(key.encode()).hexdigest()


def _inputs_or_empty(src: Source, cfg: Config) -> list:
    try:
        return source_inputs(src, cfg.read)
    except OSError:
        return []


def _shard_task(args) -> str:
    """Process one record and write its shard (in a worker process or on a Dask worker)."""
    from prep.pipeline.chunks import process_source
    from threadpoolctl import threadpool_limits
    src, cfg, axis, mapping, root, key, inputs = args
    # one BLAS thread per task: N worker processes then use N cores, not N x BLAS threads, and
    # the results cannot depend on how many threads a matrix product was split over
    with threadpool_limits(limits=1):
        res = process_source(src, cfg, axis, mapping, [tuple(x) for x in inputs] or None)
    if inputs and not res.inputs:  # a record that failed still names the files it came from
        res.inputs = [tuple(x) for x in inputs]
    write_shard(root, res, key, inputs)
    return res.error


def _n_workers(workers: int | None) -> int:
    return max(1, workers or int(os.environ.get("BEATMILL_WORKERS", 0) or 0) or os.cpu_count() or 1)


def _warm() -> None:
    """Pool initializer: import the second detector's library (about 1 s) while the parent is
    still hashing inputs, instead of on each worker's first record."""
    import neurokit2  # noqa: F401


def _start_pool(n: int):
    """A process pool of ``n`` workers, warming up at once (fork where the platform has it:
    children need not re-import the caller's main module, such as a notebook or an unguarded
    script; elsewhere spawn)."""
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor
    method = "fork" if "fork" in mp.get_all_start_methods() else "spawn"
    pool = ProcessPoolExecutor(max_workers=n, mp_context=mp.get_context(method), initializer=_warm)
    for _ in range(n):  # start every worker now (the pool would start them one task at a time)
        pool.submit(int)
    return pool


def _execute(tasks: list, workers: int | None, dask: str | None, pool=None):
    """Run shard tasks; yields each task's error text ('' when fine) in task order.
    ``pool``: a pool from :func:`_start_pool` to use (and shut down)."""
    if not tasks:
        if pool is not None:
            pool.shutdown(cancel_futures=True)
        return
    if dask:
        yield from _execute_dask(tasks, dask)
        return
    n = min(_n_workers(workers), len(tasks))
    if n == 1 and pool is None:
        for t in tasks:
            yield _shard_task(t)
        return
    from concurrent.futures.process import BrokenProcessPool

    pool = pool or _start_pool(n)
    with pool:
        futures = [pool.submit(_shard_task, t) for t in tasks]
        for f in futures:  # in task order; the pool works ahead meanwhile
            try:
                yield f.result()
            except BrokenProcessPool:
                yield "a worker process died (out of memory?) while processing this record"
            except Exception as exc:  # noqa: BLE001 - a task's failure is that record's failure
                yield f"unexpected {type(exc).__name__}: {exc}"


def _execute_dask(tasks: list, address: str):
    """Send shard tasks to a dask.distributed cluster (``local``: a LocalCluster)."""
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise ConfigError("--dask needs dask.distributed: pip install 'beatmill[dask]'") from None
    cluster = None
    if address == "local":
        cluster = LocalCluster(n_workers=os.cpu_count() or 1, threads_per_worker=1,
                               processes=True, dashboard_address=None)
        client = Client(cluster)
    else:
        client = Client(address)
    try:
        futures = client.map(_shard_task, tasks, pure=False)
        for f in futures:
            try:
                yield f.result()
            except Exception as exc:  # noqa: BLE001
                yield f"unexpected {type(exc).__name__} on a Dask worker: {exc}"
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def _swap_in(staging: Path, out: Path) -> None:
    """Move the staged files into ``out``; the manifest, which vouches for the others, last.
    A failure while writing (no space, no permission) happens in the staging folder, before
    anything in ``out`` is touched."""
    for name in TENSOR_FILES + TABLE_FILES + (MANIFEST,):
        os.replace(staging / name, out / name)


def _prepare_out(out: Path, overwrite: bool, config_hash: str) -> None:
    """Refuse, before any work, an output that is in the way; nothing is deleted here.

    A dataset folder written with the same configuration hash is processed again in place (the
    outputs are the same for the same inputs); one with another configuration needs --overwrite.
    """
    if out.exists() and not out.is_dir():
        raise ConfigError(f"output {out} exists and is not a folder; choose another --out")
    if out.exists() and any(out.iterdir()):
        previous = _previous_hash(out)
        if previous == config_hash:
            _mark_run(out, config_hash)
            return
        if not overwrite:
            if previous:
                raise ConfigError(f"output folder {out} holds a dataset made with another "
                                  f"configuration (hash {previous[:12]}, this run {config_hash[:12]}); "
                                  "choose a new --out or pass --overwrite to replace it")
            raise ConfigError(f"output folder {out} is not empty; choose a new --out or pass "
                              "--overwrite to replace it")
        if not (out / MANIFEST).exists() and not (out / ".shards" / "RUN.json").exists():
            raise ConfigError(f"refusing to replace {out}: it holds files but no {MANIFEST}, so "
                              "it is not a beatmill dataset; remove it yourself if you mean it")
    if not os.access(out if out.exists() else _existing_parent(out), os.W_OK):
        raise ConfigError(f"cannot write to {out}: permission denied; choose another --out")
    if overwrite and (out / ".shards").exists():
        shutil.rmtree(out / ".shards")  # shards of another configuration
    _mark_run(out, config_hash)


def _mark_run(out: Path, config_hash: str) -> None:
    """Record the configuration of the run in progress, so a killed run is resumed only with it."""
    (out / ".shards").mkdir(parents=True, exist_ok=True)
    (out / ".shards" / "RUN.json").write_text(json.dumps({"config_sha256": config_hash}))


def _previous_hash(out: Path) -> str | None:
    """Config hash of the dataset in ``out``, or of the run that was writing it when it stopped."""
    for f in (out / MANIFEST, out / ".shards" / "RUN.json"):
        try:
            return json.loads(f.read_text(encoding="utf-8")).get("config_sha256")
        except (OSError, ValueError, AttributeError):
            continue
    return None


def _existing_parent(p: Path) -> Path:
    while not p.exists():
        p = p.parent
    return p


def _resolve_extras(cfg: Config) -> tuple[dict, dict, dict]:
    """Files the config names, read now: symbol map, patient map, and their hash contribution."""
    mapping = load_mapping(cfg.labels.mapping_file)
    pmap = load_patient_map(cfg.split.patient_map)
    return mapping, pmap, {"labels.mapping": mapping, "split.patient_map": pmap}


@dataclass
class Assembled:
    """A whole dataset: what a run folder holds, before it is written."""

    beats: np.ndarray          # (n_kept, n_leads, n_samples) float32, normalized
    lead_mask: np.ndarray      # (n_kept, n_leads) bool
    norm_center: np.ndarray    # (n_kept, n_leads) float32
    norm_scale: np.ndarray     # (n_kept, n_leads) float32
    table: pd.DataFrame | None     # beats.parquet (None: already streamed into the file)
    leads: pd.DataFrame        # leads.parquet
    records: pd.DataFrame      # records.parquet
    windows: pd.DataFrame | None   # windows.parquet (None: already streamed into the file)
    manifest: dict             # manifest.json without the file checksums
    exit_code: int


class _Rows:
    """Where consolidation puts table rows (pyarrow Tables or DataFrames), a record at a time:
    kept in memory and returned as one DataFrame by default; :class:`_ParquetRows` streams them
    into a file instead."""

    def __init__(self):
        self.parts: list = []

    def add(self, rows) -> None:
        t = _arrow(rows)
        if t.num_rows:
            self.parts.append(t)

    def finish(self, empty: pd.DataFrame) -> pd.DataFrame | None:
        import pyarrow as pa
        if not self.parts:
            return empty
        return pa.concat_tables(self.parts, promote_options="default").to_pandas()


class _ParquetRows(_Rows):
    """Rows written to a Parquet file in row groups of about ``group`` rows; memory holds one
    group at most. The schema is fixed by ``schema`` or by the first rows written (a column
    later rows lack is written as nulls; one they add is left out)."""

    def __init__(self, path: Path, schema=None, group: int = 65536):
        super().__init__()
        self.path, self.schema, self.group = path, schema, group
        self.writer = None
        self.n = 0

    def add(self, rows) -> None:
        t = _arrow(rows)
        if t.num_rows:
            self.parts.append(t)
            self.n += t.num_rows
        if self.n >= self.group:
            self._flush()

    def _flush(self) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        if not self.parts:
            return
        if self.schema is None:  # an all-empty column would be typed null: make it text
            sch = pa.concat_tables(self.parts, promote_options="default").schema
            self.schema = pa.schema([f.with_type(pa.string()) if pa.types.is_null(f.type) else f
                                     for f in sch]).remove_metadata()
        table = pa.concat_tables([_conform(t, self.schema) for t in self.parts])
        self.parts, self.n = [], 0
        if self.writer is None:
            self.writer = pq.ParquetWriter(self.path, self.schema, compression="zstd")
        self.writer.write_table(table)

    def finish(self, empty: pd.DataFrame) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        self._flush()
        if self.writer is None:  # no rows at all: an empty file with the columns
            pq.write_table(pa.Table.from_pandas(empty, schema=self.schema, preserve_index=False)
                           if self.schema is not None else
                           pa.Table.from_pandas(empty, preserve_index=False), self.path,
                           compression="zstd")
        else:
            self.writer.close()
        return None


def _arrow(rows):
    """A pyarrow Table of ``rows`` (a Table already, or a DataFrame)."""
    import pyarrow as pa
    return rows if isinstance(rows, pa.Table) else pa.Table.from_pandas(rows, preserve_index=False)


def _conform(t, schema):
    """Table ``t`` with exactly ``schema``'s columns, in order and cast to its types (a column
    ``t`` lacks becomes nulls)."""
    import pyarrow as pa
    have = set(t.column_names)
    return pa.Table.from_arrays([t.column(f.name).cast(f.type) if f.name in have else
                                 pa.nulls(t.num_rows, f.type) for f in schema], schema=schema)


def _beats_schema():
    """The fixed Arrow schema of beats.parquet (row groups from different records must agree)."""
    import pyarrow as pa
    arrow = {"str": pa.string(), "int64": pa.int64(), "float64": pa.float64(), "bool": pa.bool_()}
    return pa.schema([(c, arrow[t]) for c, t in zip(BEAT_COLUMNS, BEAT_TYPES)] +
                     [("patient", pa.string()), ("split", pa.string())])


@dataclass
class _Part:
    """What consolidation keeps of one record between its passes: a few numbers, no table."""

    patient: str
    split: str
    n_beats: int
    kept: dict          # kept beats per class (NaN class under key None), before split rules
    n_final: int = 0    # kept beats after the split rules
    offset: int = 0     # first tensor row of the record


def _beats_arrow(r: RecordResult, schema):
    """Record ``r``'s beat table as a pyarrow Table in ``schema``'s columns, less the last two
    (patient and split, added by consolidation)."""
    import pyarrow as pa
    base = pa.schema(list(schema)[:-2])
    t = None
    if r.beats is None and r.store is not None:
        t = r.store.arrow("beats")
    elif r.beats is not None and len(r.beats.columns):
        t = _arrow(r.beats)
    return base.empty_table() if t is None else _conform(t, base)


def _windows_arrow(r: RecordResult):
    """Record ``r``'s window table as a pyarrow Table (None when it has none)."""
    if r.windows is None and r.store is not None:
        return r.store.arrow("windows")
    return None if r.windows is None else _arrow(r.windows)


def _columns_of(r: RecordResult, columns: list[str]) -> dict[str, np.ndarray]:
    """A few beat-table columns as arrays (from memory or from the shard, without pandas)."""
    t = _beats_arrow(r, _beats_schema())
    return {c: t.column(c).to_numpy(zero_copy_only=False) for c in columns}


def _kept_classes(r: RecordResult) -> dict:
    """Kept beats per class (unlabeled under None): from the shard's summary when it has one,
    else summarized here from the beat table."""
    kept = r.store.kept if r.beats is None and r.store is not None else None
    if kept is None:
        kept = kept_summary(pd.DataFrame(_columns_of(
            r, ["included", "class", "r_sample", "tensor_index"])))
    return {k: int(v) for k, v in kept["classes"]}


def _rules_apply(split: str, fixed: bool, train_classes: set) -> bool:
    """Whether the split settings may exclude some of a record's kept beats
    (see :func:`_rule_reasons`)."""
    return (fixed and not split) or (split == "train" and bool(train_classes))


def _rule_reasons(b, split: str, fixed: bool, train_classes: set) -> np.ndarray:
    """Exclusions the split settings add to a record's kept beats ('' = none). ``b``: a beat
    table or a mapping of its columns."""
    inc = np.asarray(b["included"], bool)
    extra = np.full(inc.size, "", dtype=object)
    if fixed and not split:
        extra[inc] = "not_in_split_lists"
    elif split == "train" and train_classes:
        off = inc & ~np.isin(np.asarray(b["class"], dtype=object), sorted(train_classes))
        extra[off] = "not_train_class"
    return extra


def _final_rows(b, extra: np.ndarray) -> np.ndarray:
    """Positions in ``b`` of the beats that reach the tensor, in tensor order (time)."""
    idx = np.flatnonzero(np.asarray(b["included"], bool) & (extra == ""))
    return idx[np.argsort(np.asarray(b["r_sample"])[idx], kind="stable")]


def assemble(results: list[RecordResult], cfg: Config, axis: list[str], given: list[str],
             record_paths: list[str], mapping: dict, pmap: dict, extra: dict,
             alloc=None, tables_to: Path | None = None) -> Assembled:
    """Split, order, normalize and tabulate processed records into one dataset.

    ``alloc(name, shape, dtype)`` provides the output arrays (default: in memory); the writer
    passes memory-mapped files. With ``tables_to`` (a folder), beats.parquet and
    windows.parquet are streamed there. Records are visited one at a time in a few passes
    (class counts, normalization statistics, tensor, tables), and tables left in shards
    (``RecordResult.store``) are read only while their record is visited, so peak memory does
    not grow with the number of records. Class counts and, where no split rule drops beats,
    tensor placement come from each shard's kept-beat summary without a table read; the
    tables pass works on pyarrow Tables (no DataFrame per record).
    """
    alloc = alloc or (lambda name, shape, dtype: np.zeros(shape, dtype))
    n_ax, n_s = len(axis), cfg.resample.n_samples
    for r in results:  # failed records contribute empty arrays of the right shape
        if r.tensor is None:
            r.tensor = np.zeros((0, n_ax, n_s))
            r.mask = np.zeros((0, n_ax), bool)

    # ---- pass 1: kept beats per class, then patients and splits --------------------------
    patients = [patient_of(r.name, r.comments, pmap, cfg.split.patient_pattern) for r in results]
    parts = [_Part(p, "", r.n_beats, _kept_classes(r)) for r, p in zip(results, patients)]
    sp = cfg.split
    fixed = bool(sp.train_patients or sp.val_patients or sp.test_patients)
    if fixed:
        split_of = fixed_assignment(sorted(set(patients)), sp.train_patients, sp.val_patients,
                                    sp.test_patients)
    else:
        counts: dict[str, dict[str, int]] = {}
        for part in parts:
            c = counts.setdefault(part.patient, {})
            for k, v in part.kept.items():
                if k is not None:
                    c[k] = c.get(k, 0) + v
        split_of = assign_patients(counts, sp.ratios, sp.seed)
    train_classes = set(cfg.labels.train_classes)
    for part in parts:
        part.split = split_of.get(part.patient, "")
        if fixed and not part.split:
            part.n_final = 0
        elif part.split == "train" and train_classes:
            part.n_final = sum(v for k, v in part.kept.items() if k in train_classes)
        else:
            part.n_final = sum(part.kept.values())

    # ---- global order: split, then patient, then record and time -----------------------
    rank = {"train": 0, "val": 1, "test": 2}
    order = sorted((k for k, part in enumerate(parts) if part.n_final),
                   key=lambda k: (rank.get(parts[k].split, 3), parts[k].patient,
                                  results[k].name, k))
    at = 0
    ranges = {s: [0, 0] for s in SPLITS}
    for k in order:
        parts[k].offset = at
        at += parts[k].n_final
        rg = ranges.get(parts[k].split)
        if rg is not None:
            if rg == [0, 0]:
                rg[0] = parts[k].offset
            rg[1] = at
    n_total = at

    def local_rows(k: int) -> np.ndarray:
        """Shard tensor rows of record k's final beats, in tensor order."""
        kept = results[k].store.kept if results[k].store is not None else None
        if kept and kept["in_order"] and not _rules_apply(parts[k].split, fixed, train_classes):
            return np.arange(results[k].tensor.shape[0])  # no table read needed
        b = _columns_of(results[k], ["included", "class", "r_sample", "tensor_index"])
        rows = _final_rows(b, _rule_reasons(b, parts[k].split, fixed, train_classes))
        return np.asarray(b["tensor_index"])[rows]

    tensor, mask, center, scale, norm_note = _gather_normalized(
        results, [(k, parts[k].split) for k in order], local_rows, n_total, cfg, n_ax, n_s, alloc)

    # ---- pass 4: tables, record by record in input order (pyarrow, no DataFrame) ---------
    import pyarrow as pa
    import pyarrow.compute as pc
    schema_b = _beats_schema()
    sink_b = _ParquetRows(tables_to / "beats.parquet", schema_b) if tables_to else _Rows()
    sink_w = _ParquetRows(tables_to / "windows.parquet") if tables_to else _Rows()
    reason_counts: dict[str, int] = {}
    split_classes = {s: {} for s in SPLITS}
    n_beats_all = 0
    for k, (r, part) in enumerate(zip(results, parts)):
        t = _beats_arrow(r, schema_b)
        n = t.num_rows
        cols = {c: t.column(c).to_numpy(zero_copy_only=False)
                for c in ("included", "class", "r_sample")}
        more = _rule_reasons(cols, part.split, fixed, train_classes)
        hit = more != ""
        if hit.any():  # the split settings exclude some kept beats: say why in their rows
            reasons = t.column("reasons").to_numpy(zero_copy_only=False).astype(object)
            flags = t.column("flags").to_numpy(zero_copy_only=False).astype(object)
            reasons[hit] = [reasons_mod.join([c]) for c in more[hit]]
            flags[hit] = ""
            inc = cols["included"].astype(bool)
            inc[hit] = False
            for name, v, typ in (("reasons", reasons, pa.string()), ("flags", flags, pa.string()),
                                 ("included", inc, pa.bool_())):
                t = t.set_column(t.schema.get_field_index(name), name, pa.array(v, typ))
        rows = _final_rows(cols, more)
        ti = np.full(n, -1, np.int64)
        ti[rows] = part.offset + np.arange(rows.size)
        t = t.set_column(t.schema.get_field_index("tensor_index"), "tensor_index", pa.array(ti))
        for d in pc.value_counts(t.column("reasons")).to_pylist():  # a few distinct cells
            for c in filter(None, (d["values"] or "").split(";")):
                reason_counts[c] = reason_counts.get(c, 0) + int(d["counts"])
        if part.split in split_classes and rows.size:
            sc = split_classes[part.split]
            for d in pc.value_counts(t.column("class").take(pa.array(rows))).to_pylist():
                if d["values"] is not None:
                    sc[str(d["values"])] = sc.get(str(d["values"]), 0) + int(d["counts"])
        n_beats_all += n
        t = t.append_column("patient", pa.array([part.patient] * n, pa.string()))
        sink_b.add(t.append_column("split", pa.array([part.split] * n, pa.string())))
        w = _windows_arrow(r)
        if w is not None:
            sink_w.add(w)
        del t, w
    empty_b = empty_beats()
    empty_b["patient"], empty_b["split"] = pd.Series(dtype="str"), pd.Series(dtype="str")
    beats = sink_b.finish(empty_b)
    windows = sink_w.finish(pd.DataFrame({c: pd.Series(dtype="float64") for c in
                                          ["record", "lead", "start", "end", "grade",
                                           "decided_by"]}))

    lead_rows = [row for r in results for row in r.leads]
    leads = pd.DataFrame(lead_rows) if lead_rows else pd.DataFrame(
        {c: [] for c in ("record", "lead", "source_name", "used", "reason", "in_axis")})
    records = pd.DataFrame({
        "record": [r.name for r in results], "status": [r.status for r in results],
        "error": [r.error for r in results], "fs": [float(r.fs) for r in results],
        "duration_s": [float(r.duration_s) for r in results],
        "n_leads": [int(r.n_leads) for r in results],
        "n_beats": [part.n_beats for part in parts],
        "n_kept": [part.n_final for part in parts],
        "patient": patients, "split": [part.split for part in parts],
        "warnings": ["; ".join(r.warnings) for r in results],
        "inputs": [[{"file": f, "sha256": h} for f, h in r.inputs] for r in results]})
    yield_section = _class_yield(results, parts, records)

    n_failed = sum(r.status == "failed" for r in results)
    n_nolead = sum(r.status == "no_usable_lead" for r in results)
    split_info = {}
    for sname in SPLITS:
        split_info[sname] = {
            "rows": ranges[sname], "beats": int(ranges[sname][1] - ranges[sname][0]),
            "patients": sorted(set(p for p, part in zip(patients, parts) if part.split == sname)),
            "classes": dict(sorted(split_classes[sname].items()))}
    manifest = {
        "tool": {"name": "beatmill", "version": __version__},
        "config_sha256": cfg.sha256(extra),
        "config": cfg.to_dict(),
        "resolved_files": extra,
        "environment": environment(),
        "lead_axis": axis,
        "tensor": {"file": "beats.npy", "shape": list(tensor.shape), "dtype": "float32",
                   "order": "C", "axes": ["beat", "lead", "sample"],
                   "row_order": "split (train, val, test), then patient, record and time",
                   "normalization": {"method": cfg.normalize.method, "scope": cfg.normalize.scope,
                                     "statistics_from": norm_note,
                                     "invert": "beat_mv = beats * norm_scale[..., None] + "
                                               "norm_center[..., None]"}},
        "labels": {"window_ms": cfg.labels.window_ms,
                   "classes": {**AAMI_CLASSES, **mapping}, "unlabeled": UNLABELED,
                   "train_classes": sorted(train_classes)},
        "splits": split_info,
        "class_yield": yield_section,
        "inputs": {"given": given, "records": record_paths},
        "counts": {"records": len(results), "records_ok": len(results) - n_failed - n_nolead,
                   "records_failed": n_failed, "records_no_usable_lead": n_nolead,
                   "beats": int(n_beats_all), "beats_kept": int(tensor.shape[0]),
                   "beats_excluded": int(n_beats_all - tensor.shape[0]),
                   "excluded_by_reason": dict(sorted(reason_counts.items()))},
        "records": (_RecordsSection(results) if any(r.store is not None for r in results)
                    else dict(_RecordsSection(results))),  # in-memory results: a plain dict
    }
    usable = len(results) - n_failed - n_nolead
    code = (EXIT_NONE_USABLE if usable == 0 else EXIT_SOME_FAILED if usable < len(results)
            else EXIT_OK)
    return Assembled(tensor, mask, center, scale, beats, leads, records, windows, manifest, code)


#: an abnormal class is "clearly" kept less than N when its kept share is this much lower and it
#: has at least _YIELD_MIN_BEATS reference beats (design choice, no source)
_YIELD_GAP = 0.05
_YIELD_MIN_BEATS = 20


def _class_yield(results: list[RecordResult], parts: list, records: pd.DataFrame) -> dict:
    """Reference beats per class and the share of them kept, over the records with reference
    annotations; adds ``n_ref_C``, ``n_undetected_C``, ``n_kept_C`` columns to ``records``
    (<NA> for records without annotations) and warns when an abnormal class is kept at a
    clearly lower share than N. Kept counts are before split rules (train_classes)."""
    classes = sorted({c for r in results for c in r.class_yield})
    total = {c: {"reference": 0, "detected": 0, "kept": 0} for c in classes}
    for c in classes:
        cols = {f"n_ref_{c}": [], f"n_undetected_{c}": [], f"n_kept_{c}": []}
        for r in results:
            y = r.class_yield.get(c) if r.class_yield else None
            if not r.class_yield:
                v = [None, None, None]
            else:
                y = y or {"reference": 0, "detected": 0, "kept": 0}
                v = [y["reference"], y["reference"] - y["detected"], y["kept"]]
                for k in ("reference", "detected", "kept"):
                    total[c][k] += y[k]
            for col, x in zip(cols, v):
                cols[col].append(x)
        for col, vals in cols.items():
            records[col] = pd.array(vals, dtype="Int64")
    for c, t in total.items():
        t["kept_share"] = round(t["kept"] / t["reference"], 6) if t["reference"] else None
    warnings = []
    n_share = total.get("N", {}).get("kept_share")
    for c in ("S", "V", "F"):
        t = total.get(c)
        if (t and n_share is not None and t["reference"] >= _YIELD_MIN_BEATS
                and t["kept_share"] < n_share - _YIELD_GAP):
            warnings.append(f"class {c}: {t['kept_share']:.1%} of {t['reference']} reference "
                            f"beats kept, against {n_share:.1%} of N beats; the dataset "
                            "under-represents this class (see beatmill reasons and the "
                            "excluded rows of this class in beats.parquet)")
    return {"records_with_reference": int(sum(bool(r.class_yield) for r in results)),
            "by_class": total, "warnings": warnings,
            "rule": f"warn when an abnormal class (S, V, F) with at least {_YIELD_MIN_BEATS} "
                    f"reference beats is kept at a share more than {_YIELD_GAP:.0%} below N's"}


class _RecordsSection(Mapping):
    """The manifest's per-record section, built one record at a time when it is read or
    written: stage logs left in shards are read then, so consolidation holds none of them."""

    def __init__(self, results: list[RecordResult]):
        self._by = {r.name: r for r in results}

    def __getitem__(self, name: str) -> dict:
        r = self._by[name]
        stages = ([lg.to_dict() for lg in r.logs] if r.logs or r.store is None
                  else r.store.stages())
        return {"status": r.status, "error": r.error, "warnings": r.warnings, "stages": stages}

    def __iter__(self):
        return iter(self._by)

    def __len__(self) -> int:
        return len(self._by)


def write_assembled(out: Path, a: Assembled) -> None:
    """Write an assembled dataset; the manifest, holding every file's SHA-256, comes last.
    Tensors and tables already streamed into ``out`` (see :func:`assemble`) are closed, not
    copied."""
    known = {}  # SHA-256 of tensors hashed while they were written
    for name, arr in (("beats.npy", a.beats), ("lead_mask.npy", a.lead_mask),
                      ("norm_center.npy", a.norm_center), ("norm_scale.npy", a.norm_scale)):
        if isinstance(arr, NpyWriter) and arr.path.resolve() == (out / name).resolve():
            arr.close()
            if arr.sha256:
                known[name] = arr.sha256
        else:
            write_npy(out / name, arr)
    for name, df in (("beats.parquet", a.table), ("leads.parquet", a.leads),
                     ("records.parquet", a.records), ("windows.parquet", a.windows)):
        if df is not None:
            write_parquet(out / name, df)
        elif not (out / name).exists():
            raise FileNotFoundError(f"{out / name}: the streamed table was not written")
    manifest = {**a.manifest,
                "files": {f: known.get(f) or sha256_file(out / f)
                          for f in TENSOR_FILES + TABLE_FILES}}
    write_manifest(out / MANIFEST, manifest)


def _summary(out: Path, a: Assembled) -> RunSummary:
    c = a.manifest["counts"]
    return RunSummary(out, c["records"], c["records_failed"], c["records_no_usable_lead"],
                      c["beats"], c["beats_kept"], a.manifest["lead_axis"], a.exit_code,
                      a.manifest["splits"], a.manifest.get("class_yield"))


def _gather_normalized(results: list[RecordResult], order: list[tuple[int, str]], local_rows,
                       n: int, cfg: Config, n_ax: int, n_s: int, alloc):
    """Copy kept beats into the output arrays in their final order, normalized, one record at a
    time (``order``: record index and split, in tensor order; ``local_rows(k)``: record k's
    shard rows in tensor order). Dataset statistics come from the training split."""
    m, scope = cfg.normalize.method, cfg.normalize.scope
    tensor = alloc("beats.npy", (n, n_ax, n_s), np.float32)
    mask = alloc("lead_mask.npy", (n, n_ax), np.bool_)
    center = alloc("norm_center.npy", (n, n_ax), np.float32)
    scale = alloc("norm_scale.npy", (n, n_ax), np.float32)

    def rows(arr, li, dtype):
        # a memory-mapped shard is mapped afresh and unmapped after the read: pages touched
        # through a long-lived map would stay resident and peak memory would grow with records
        if isinstance(arr, np.memmap):
            fresh = np.load(arr.filename, mmap_mode="r")
            out = np.asarray(fresh[li], dtype=dtype)
            del fresh
            return out
        return np.asarray(arr[li], dtype=dtype)

    def batches(k: int, li: np.ndarray):
        for i in range(0, li.size, _BATCH):
            part = li[i:i + _BATCH]
            yield i, rows(results[k].tensor, part, np.float64), rows(results[k].mask, part, bool)

    note = {"beat": "each beat and lead", "record": "each record and lead"}.get(scope, "")
    stats = None
    if scope == "dataset" and n:
        has_train = any(s == "train" for _, s in order)
        train = [k for k, s in order if s == "train"] if has_train else [k for k, _ in order]
        note = ("the training split, per lead" if has_train
                else "all kept beats, per lead (the training split is empty)")

        def stream():  # every training beat batch; may be walked more than once
            for k in train:
                for _, raw, mk in batches(k, local_rows(k)):
                    yield raw, mk
        stats = lead_stats(m, n_ax, stream)
    at = 0
    for k, _ in order:  # one step per record, in batches so a long record stays bounded
        li = local_rows(k)
        if scope == "record":
            rec_stats = lead_stats(m, n_ax, lambda: ((raw, mk) for _, raw, mk in batches(k, li)))
        for i, raw, mk in batches(k, li):
            if scope == "beat":
                y, c, sc = normalize(raw, mk, m, "beat")
            else:
                st = rec_stats if scope == "record" else stats
                y, c, sc = apply_stats(raw, mk, st[0][None, :], st[1][None, :])
            j = at + i
            tensor[j:j + len(raw)] = y
            mask[j:j + len(raw)] = mk
            center[j:j + len(raw)] = c
            scale[j:j + len(raw)] = sc
        at += li.size
    return tensor, mask, center, scale, note


_BATCH = 4096  # beats normalized at once: ~16 MB of float64 per lead at 256 samples


def lead_stats(method: str, n_leads: int, stream) -> tuple[np.ndarray, np.ndarray]:
    """Per-lead (centre, scale) over the unmasked leads of the beat batches ``stream()``
    yields as (beats, mask). ``stream`` is called once per pass: one pass for zscore and minmax;
    robust (median and IQR, exact, as ``numpy.percentile``) narrows a value interval per
    quantile with histograms over a few passes, so memory stays bounded by one batch plus at
    most ``_EXACT`` values per quantile instead of holding every value."""
    c, s = np.zeros(n_leads), np.ones(n_leads)
    if method == "none":
        return c, s
    sm, sq, cnt = np.zeros(n_leads), np.zeros(n_leads), np.zeros(n_leads, np.int64)
    lo, hi = np.full(n_leads, np.inf), np.full(n_leads, -np.inf)
    for beats, mk in stream():
        for j in range(n_leads):
            v = beats[mk[:, j], j]
            if v.size:
                sm[j] += v.sum()
                sq[j] += (v * v).sum()
                cnt[j] += v.size
                lo[j] = min(lo[j], v.min())
                hi[j] = max(hi[j], v.max())
    for j in range(n_leads):
        if cnt[j] == 0:
            continue
        if method == "zscore":
            c[j] = sm[j] / cnt[j]
            s[j] = np.sqrt(max(sq[j] / cnt[j] - c[j] ** 2, 0.0))
        elif method == "minmax":
            c[j], s[j] = lo[j], hi[j] - lo[j]
        else:
            q1, q2, q3 = _exact_percentiles(stream, j, int(cnt[j]), lo[j], hi[j], (25, 50, 75))
            c[j], s[j] = q2, q3 - q1
    s = np.where(s > 1e-6, s, 1.0)
    return c, s


_EXACT = 1 << 20  # values gathered for an exact quantile once its interval holds this few


def _exact_percentiles(stream, lead: int, n: int, lo: float, hi: float, qs) -> list[float]:
    """Exact ``numpy.percentile`` (linear interpolation) of one lead's values, found without
    holding them all: each needed order statistic is located by histogram passes that narrow
    its value interval, then read exactly from the few values left in it."""
    def values(a, b, closed):
        for beats, mk in stream():
            v = beats[mk[:, lead], lead].ravel()
            yield v[(v >= a) & ((v <= b) if closed else (v < b))]

    def order_stat(rank: int) -> float:
        a, b, closed, below = lo, hi, True, 0  # `below` values lie under the interval
        while a < b:
            edges = np.linspace(a, b, 1025)
            if not (edges[0] < edges[1] and edges[-2] < edges[-1]):
                break  # as narrow as floating point allows
            hist = np.zeros(1024, np.int64)
            for v in values(a, b, closed):
                hist += np.histogram(v, edges)[0]  # last bin closed; half-open input skips b
            cum = below + np.cumsum(hist)
            i = min(int(np.searchsorted(cum, rank, side="right")), 1023)
            a, b, closed = edges[i], edges[i + 1], closed and i == 1023
            below = int(cum[i] - hist[i])
            if hist[i] <= _EXACT:
                break
        if a >= b:
            return float(a)
        got = np.sort(np.concatenate(list(values(a, b, closed))))
        return float(got[rank - below]) if got.size > rank - below else float(a)

    found: dict[int, float] = {}
    out = []
    for q in qs:
        h = (n - 1) * q / 100.0
        k = int(np.floor(h))
        k1 = min(n - 1, k + 1)
        for r in (k, k1):
            if r not in found:
                found[r] = order_stat(r)
        out.append(found[k] + (h - k) * (found[k1] - found[k]))
    return out


def split_summary(info: dict) -> str:
    """The end-of-run table: beats per split and class, patients per split."""
    classes = sorted({c for v in info.values() for c in v["classes"]})
    head = f"{'split':<6}{'patients':>9}{'beats':>8}" + "".join(f"{c:>11}" for c in classes)
    lines = [head]
    for sname, v in info.items():
        lines.append(f"{sname:<6}{len(v['patients']):>9}{v['beats']:>8}" +
                     "".join(f"{v['classes'].get(c, 0):>11}" for c in classes))
    return "\n".join(lines)


def yield_summary(section: dict | None) -> str:
    """The end-of-run lines on class yield: reference beats per class and the share kept
    ('' when no record has reference annotations)."""
    if not section or not section.get("by_class"):
        return ""
    by = section["by_class"]
    lines = [f"reference beats kept, per class ({section['records_with_reference']} annotated "
             "records):",
             "  ".join(f"{c} {t['kept']}/{t['reference']} ({t['kept_share']:.1%})"
                       for c, t in by.items() if t["reference"])]
    lines += [f"warning: {w}" for w in section.get("warnings", [])]
    return "\n".join(lines)
