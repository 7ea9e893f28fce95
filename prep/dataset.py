"""``run``: read sources, process every record, and write one dataset folder."""
from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from . import __version__
from .config import Config
from .errors import ConfigError
from .export import (MANIFEST, TABLE_FILES, TENSOR_FILES, NpyWriter, environment,
                     write_manifest, write_npy, write_parquet)
from .leads import default_axis, resolve_axis
from . import reasons as reasons_mod
from .labels import AAMI_CLASSES, UNLABELED, load_mapping
from .normalize import apply_stats, normalize
from .pipeline import BEAT_COLUMNS, RecordResult, _empty_beats
from .split import SPLITS, assign_patients, fixed_assignment, load_patient_map, patient_of
from .read import Source, find_sources, read_source, sha256_file, source_inputs
from .shards import read_shard, write_shard

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


def _peek_leads(src: Source, cfg: Config) -> list[str] | None:
    """Canonical ECG leads of a source, reading only its header when possible."""
    if src.kind == "wfdb":
        try:
            import wfdb

            from .leads import canonical_lead, classify_channel
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

    if cfg.leads.select:
        axis = resolve_axis(cfg.leads.select)
    else:
        peeks = [lp for lp in (_peek_leads(s, cfg) for s in found) if lp]
        axis = default_axis(peeks)
        if not axis:
            raise ConfigError("the records share no ECG lead; choose the lead axis with --leads "
                              "(for example --leads II)")
    # inputs are hashed first: a committed shard is reused only for unchanged inputs
    inputs = [_inputs_or_empty(s, cfg) for s in found]
    key = _shard_hash(json.dumps({"config": chash, "axis": axis}))
    results: list = [None] * len(found)
    todo = []
    done = 0
    for i, src in enumerate(found):
        cached = read_shard(root, src.name, key, inputs[i])
        if cached is None:
            todo.append(i)
        else:
            results[i] = cached
            done += 1
            if progress:
                progress(cached, done, len(found))
    if len(found) - len(todo):
        log.info("reusing %d committed shards", len(found) - len(todo))
    tasks = [(found[i], cfg, axis, mapping, root, key, inputs[i]) for i in todo]
    for i, error in zip(todo, _execute(tasks, workers, dask)):
        done += 1
        res = read_shard(root, found[i].name, key, inputs[i])
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
                     mapping, pmap, extra, alloc=alloc)
        write_assembled(staging, a)
        _swap_in(staging, out)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return _summary(out, a)


def _shard_hash(key: str) -> str:
    return hashlib.sha256(key.encode()).hexdigest()


def _inputs_or_empty(src: Source, cfg: Config) -> list:
    try:
        return source_inputs(src, cfg.read)
    except OSError:
        return []


def _shard_task(args) -> str:
    """Process one record and write its shard (in a worker process or on a Dask worker)."""
    from .chunks import process_source
    src, cfg, axis, mapping, root, key, inputs = args
    res = process_source(src, cfg, axis, mapping, [tuple(x) for x in inputs] or None)
    if inputs and not res.inputs:  # a record that failed still names the files it came from
        res.inputs = [tuple(x) for x in inputs]
    write_shard(root, res, key, inputs)
    return res.error


def _execute(tasks: list, workers: int | None, dask: str | None):
    """Run shard tasks; yields each task's error text ('' when fine) in task order."""
    if not tasks:
        return
    if dask:
        yield from _execute_dask(tasks, dask)
        return
    n = workers or int(os.environ.get("BEATMILL_WORKERS", 0) or 0) or os.cpu_count() or 1
    n = max(1, min(n, len(tasks)))
    if n == 1:
        for t in tasks:
            yield _shard_task(t)
        return
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor
    from concurrent.futures.process import BrokenProcessPool

    # fork where the platform has it: children need not re-import the caller's main module
    # (a notebook or an unguarded script); elsewhere spawn
    method = "fork" if "fork" in mp.get_all_start_methods() else "spawn"
    with ProcessPoolExecutor(max_workers=n, mp_context=mp.get_context(method)) as pool:
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
    """A whole dataset in memory: what a run folder holds, before it is written."""

    beats: np.ndarray          # (n_kept, n_leads, n_samples) float32, normalized
    lead_mask: np.ndarray      # (n_kept, n_leads) bool
    norm_center: np.ndarray    # (n_kept, n_leads) float32
    norm_scale: np.ndarray     # (n_kept, n_leads) float32
    table: pd.DataFrame        # beats.parquet
    leads: pd.DataFrame        # leads.parquet
    records: pd.DataFrame      # records.parquet
    windows: pd.DataFrame      # windows.parquet
    manifest: dict             # manifest.json without the file checksums
    exit_code: int


def assemble(results: list[RecordResult], cfg: Config, axis: list[str], given: list[str],
             record_paths: list[str], mapping: dict, pmap: dict, extra: dict,
             alloc=None) -> Assembled:
    """Split, order, normalize and tabulate processed records into one dataset.

    ``alloc(name, shape, dtype)`` provides the output arrays (default: in memory); the writer
    passes memory-mapped files, so the tensor streams record by record and peak memory does not
    grow with the number of records. Record tensors may be memory-mapped shards.
    """
    alloc = alloc or (lambda name, shape, dtype: np.zeros(shape, dtype))
    n_ax, n_s = len(axis), cfg.resample.n_samples
    for r in results:  # failed records contribute empty arrays of the right shape
        if r.tensor is None:
            r.tensor = np.zeros((0, n_ax, n_s))
            r.mask = np.zeros((0, n_ax), bool)
            r.beats = _empty_beats()

    # ---- patients and splits ------------------------------------------------------------
    patients = [patient_of(r.name, r.comments, pmap, cfg.split.patient_pattern) for r in results]
    sp = cfg.split
    fixed = bool(sp.train_patients or sp.val_patients or sp.test_patients)
    if fixed:
        split_of = fixed_assignment(sorted(set(patients)), sp.train_patients, sp.val_patients,
                                    sp.test_patients)
    else:
        counts: dict[str, dict[str, int]] = {}
        for r, p in zip(results, patients):
            c = counts.setdefault(p, {})
            kept = r.beats[r.beats["included"]]
            for k, v in kept["class"].value_counts().items():
                c[str(k)] = c.get(str(k), 0) + int(v)
        split_of = assign_patients(counts, sp.ratios, sp.seed)
    train_classes = set(cfg.labels.train_classes)
    frames = []
    for k, (r, p) in enumerate(zip(results, patients)):
        b = r.beats.copy(deep=False)  # copy-on-write: the record's own table is never changed
        split = split_of.get(p, "")
        b["patient"] = p
        b["split"] = split
        b["_rec"] = k
        b["_local"] = b["tensor_index"]
        extra_reason = np.full(len(b), "", dtype=object)
        if fixed and not split:
            extra_reason[b["included"].to_numpy()] = "not_in_split_lists"
        elif split == "train" and train_classes:
            off = b["included"].to_numpy() & ~b["class"].isin(train_classes).to_numpy()
            extra_reason[off] = "not_train_class"
        hit = extra_reason != ""
        if hit.any():
            b.loc[hit, "reasons"] = [reasons_mod.join([c]) for c in extra_reason[hit]]
            b.loc[hit, "flags"] = ""
            b.loc[hit, "included"] = False
        frames.append(b)
    beats = pd.concat(frames, ignore_index=True) if frames else _empty_beats()
    del frames
    if "patient" not in beats:
        beats["patient"], beats["split"], beats["_rec"], beats["_local"] = "", "", 0, -1

    # ---- global order: split, then patient, then record and time -----------------------
    rank = {"train": 0, "val": 1, "test": 2}
    kept = beats.loc[beats["included"], ["split", "patient", "record", "r_sample", "_rec",
                                         "_local"]].copy()  # only what ordering needs
    kept["_rank"] = kept["split"].map(rank).fillna(3)
    kept = kept.sort_values(["_rank", "patient", "record", "r_sample"], kind="stable")
    beats["tensor_index"] = -1
    beats.loc[kept.index, "tensor_index"] = np.arange(len(kept))
    tensor, mask, center, scale, norm_note = _gather_normalized(results, kept, cfg, n_ax, n_s,
                                                                 alloc)
    ranges = {}
    kept_split = kept["split"].to_numpy()
    for sname in SPLITS:
        idx = np.flatnonzero(kept_split == sname)
        ranges[sname] = [int(idx[0]), int(idx[-1]) + 1] if idx.size else [0, 0]
    cols = [c for c in BEAT_COLUMNS if c in beats] + ["patient", "split"]
    beats = beats[cols]
    del kept
    lead_rows = [row for r in results for row in r.leads]
    leads = pd.DataFrame(lead_rows) if lead_rows else pd.DataFrame(
        {c: [] for c in ("record", "lead", "source_name", "used", "reason", "in_axis")})
    n_kept_rec = beats[beats["included"]].groupby("record").size()
    records = pd.DataFrame({
        "record": [r.name for r in results], "status": [r.status for r in results],
        "error": [r.error for r in results], "fs": [float(r.fs) for r in results],
        "duration_s": [float(r.duration_s) for r in results],
        "n_leads": [int(r.n_leads) for r in results], "n_beats": [r.n_beats for r in results],
        "n_kept": [int(n_kept_rec.get(r.name, 0)) for r in results],
        "patient": patients, "split": [split_of.get(p, "") for p in patients],
        "warnings": ["; ".join(r.warnings) for r in results],
        "inputs": [[{"file": f, "sha256": h} for f, h in r.inputs] for r in results]})

    n_failed = sum(r.status == "failed" for r in results)
    n_nolead = sum(r.status == "no_usable_lead" for r in results)
    reason_counts: dict[str, int] = {}
    for cell in beats["reasons"]:
        for c in filter(None, str(cell).split(";")):
            reason_counts[c] = reason_counts.get(c, 0) + 1
    kept_final = beats[beats["included"]]
    split_info = {}
    for sname in SPLITS:
        part = kept_final[kept_final["split"] == sname]
        split_info[sname] = {
            "rows": ranges[sname], "beats": int(len(part)),
            "patients": sorted(set(p for p, sv in zip(patients, records["split"]) if sv == sname)),
            "classes": {str(k): int(v) for k, v in sorted(part["class"].value_counts().items())}}
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
        "inputs": {"given": given, "records": record_paths},
        "counts": {"records": len(results), "records_ok": len(results) - n_failed - n_nolead,
                   "records_failed": n_failed, "records_no_usable_lead": n_nolead,
                   "beats": int(len(beats)), "beats_kept": int(tensor.shape[0]),
                   "beats_excluded": int(len(beats) - tensor.shape[0]),
                   "excluded_by_reason": dict(sorted(reason_counts.items()))},
        "records": {r.name: {"status": r.status, "error": r.error, "warnings": r.warnings,
                             "stages": [lg.to_dict() for lg in r.logs]} for r in results},
    }
    usable = len(results) - n_failed - n_nolead
    code = (EXIT_NONE_USABLE if usable == 0 else EXIT_SOME_FAILED if usable < len(results)
            else EXIT_OK)
    wins = [r.windows for r in results if r.windows is not None]
    windows = (pd.concat(wins, ignore_index=True) if wins else
               pd.DataFrame({c: pd.Series(dtype="float64") for c in
                             ["record", "lead", "start", "end", "grade", "decided_by"]}))
    return Assembled(tensor, mask, center, scale, beats, leads, records, windows, manifest, code)


def write_assembled(out: Path, a: Assembled) -> None:
    """Write an assembled dataset; the manifest, holding every file's SHA-256, comes last.
    Tensors already streamed into ``out`` (see :func:`assemble`) are closed, not copied."""
    for name, arr in (("beats.npy", a.beats), ("lead_mask.npy", a.lead_mask),
                      ("norm_center.npy", a.norm_center), ("norm_scale.npy", a.norm_scale)):
        if isinstance(arr, NpyWriter) and arr.path.resolve() == (out / name).resolve():
            arr.close()
        else:
            write_npy(out / name, arr)
    write_parquet(out / "beats.parquet", a.table)
    write_parquet(out / "leads.parquet", a.leads)
    write_parquet(out / "records.parquet", a.records)
    write_parquet(out / "windows.parquet", a.windows)
    manifest = {**a.manifest,
                "files": {f: sha256_file(out / f) for f in TENSOR_FILES + TABLE_FILES}}
    write_manifest(out / MANIFEST, manifest)


def _summary(out: Path, a: Assembled) -> RunSummary:
    c = a.manifest["counts"]
    return RunSummary(out, c["records"], c["records_failed"], c["records_no_usable_lead"],
                      c["beats"], c["beats_kept"], a.manifest["lead_axis"], a.exit_code,
                      a.manifest["splits"])


def _gather_normalized(results: list[RecordResult], kept: pd.DataFrame, cfg: Config, n_ax: int,
                       n_s: int, alloc):
    """Copy kept beats into the output arrays in their final order, normalized, one record's
    contiguous run of rows at a time. Dataset statistics come from the training split."""
    m, scope = cfg.normalize.method, cfg.normalize.scope
    n = len(kept)
    tensor = alloc("beats.npy", (n, n_ax, n_s), np.float32)
    mask = alloc("lead_mask.npy", (n, n_ax), np.bool_)
    center = alloc("norm_center.npy", (n, n_ax), np.float32)
    scale = alloc("norm_scale.npy", (n, n_ax), np.float32)
    recs = kept["_rec"].to_numpy()
    local = kept["_local"].to_numpy()
    splits = kept["split"].to_numpy()
    cuts = np.flatnonzero(np.r_[True, recs[1:] != recs[:-1], True]) if n else np.array([0])
    runs = list(zip(cuts[:-1], cuts[1:]))

    def rows(arr, li, dtype):
        # a memory-mapped shard is mapped afresh and unmapped after the read: pages touched
        # through a long-lived map would stay resident and peak memory would grow with records
        if isinstance(arr, np.memmap):
            fresh = np.load(arr.filename, mmap_mode="r")
            out = np.asarray(fresh[li], dtype=dtype)
            del fresh
            return out
        return np.asarray(arr[li], dtype=dtype)

    def part(a, b):
        k = recs[a]
        li = local[a:b]
        return rows(results[k].tensor, li, np.float64), rows(results[k].mask, li, bool)

    note = {"beat": "each beat and lead", "record": "each record and lead"}.get(scope, "")
    stats = None
    if scope == "dataset" and n:
        acc = LeadStats(m, n_ax)
        train_runs = [(a, b) for a, b in runs if splits[a] == "train"] or runs
        note = ("the training split, per lead" if any(splits[a] == "train" for a, _ in runs)
                else "all kept beats, per lead (the training split is empty)")
        for a, b in train_runs:
            for i in range(a, b, _BATCH):
                acc.add(*part(i, min(b, i + _BATCH)))
        stats = acc.result()
    for a, b in runs:  # one step per record, in batches so a long record stays bounded
        if b <= a:
            continue
        batches = [(i, min(b, i + _BATCH)) for i in range(a, b, _BATCH)]
        if scope == "record":
            acc = LeadStats(m, n_ax)
            for i, j in batches:
                acc.add(*part(i, j))
            rec_stats = acc.result()
        for i, j in batches:
            raw, mk = part(i, j)
            if scope == "beat":
                y, c, sc = normalize(raw, mk, m, "beat")
            else:
                st = rec_stats if scope == "record" else stats
                y, c, sc = apply_stats(raw, mk, st[0][None, :], st[1][None, :])
            tensor[i:j] = y
            mask[i:j] = mk
            center[i:j] = c
            scale[i:j] = sc
    return tensor, mask, center, scale, note


_BATCH = 4096  # beats normalized at once: ~16 MB of float64 per lead at 256 samples


class LeadStats:
    """Per-lead normalization statistics accumulated over batches of beats (unmasked leads)."""

    def __init__(self, method: str, n_leads: int):
        self.method, self.n = method, n_leads
        self.sum = np.zeros(n_leads)
        self.sq = np.zeros(n_leads)
        self.cnt = np.zeros(n_leads)
        self.lo = np.full(n_leads, np.inf)
        self.hi = np.full(n_leads, -np.inf)
        self.values: list[list[np.ndarray]] = [[] for _ in range(n_leads)]

    def add(self, beats: np.ndarray, mask: np.ndarray) -> None:
        for j in range(self.n):
            v = beats[mask[:, j], j]
            if v.size == 0:
                continue
            self.sum[j] += v.sum()
            self.sq[j] += (v * v).sum()
            self.cnt[j] += v.size
            self.lo[j] = min(self.lo[j], v.min())
            self.hi[j] = max(self.hi[j], v.max())
            if self.method == "robust":  # exact quantiles need the values: one lead's train beats
                self.values[j].append(v.ravel().astype(np.float32))

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        c, s = np.zeros(self.n), np.ones(self.n)
        for j in range(self.n):
            if self.cnt[j] == 0 or self.method == "none":
                continue
            if self.method == "zscore":
                c[j] = self.sum[j] / self.cnt[j]
                s[j] = np.sqrt(max(self.sq[j] / self.cnt[j] - c[j] ** 2, 0.0))
            elif self.method == "minmax":
                c[j], s[j] = self.lo[j], self.hi[j] - self.lo[j]
            else:
                q1, q2, q3 = np.percentile(np.concatenate(self.values[j]), [25, 50, 75])
                c[j], s[j] = q2, q3 - q1
        s = np.where(s > 1e-6, s, 1.0)
        return c, s


def split_summary(info: dict) -> str:
    """The end-of-run table: beats per split and class, patients per split."""
    classes = sorted({c for v in info.values() for c in v["classes"]})
    head = f"{'split':<6}{'patients':>9}{'beats':>8}" + "".join(f"{c:>11}" for c in classes)
    lines = [head]
    for sname, v in info.items():
        lines.append(f"{sname:<6}{len(v['patients']):>9}{v['beats']:>8}" +
                     "".join(f"{v['classes'].get(c, 0):>11}" for c in classes))
    return "\n".join(lines)
