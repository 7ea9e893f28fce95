"""``run``: read sources, process every record, and write one dataset folder."""
from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Callable

import numpy as np

from prep.config import Config
from prep.dataset.assemble import Assembled, Provenance, assemble, write_assembled
from prep.dataset.execute import execute, n_workers, start_pool
from prep.dataset.export import NpyWriter
from prep.dataset.folder import JOURNAL, prepare_out, swap_in
from prep.dataset.shards import ShardIndex, shard_folder, write_shard
from prep.dataset.split import load_patient_map
from prep.errors import ConfigError
from prep.io.sources import Source, find_sources, source_inputs, source_leads
from prep.leads import default_axis, lead_counts, match_lead, nearest_lead, resolve_axis
from prep.pipeline.result import RecordResult
from prep.stages.labels import AAMI_CLASSES, UNLABELED, load_mapping

log = logging.getLogger("prep")



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
    warnings: list | None = None      # the manifest's warnings (axis gaps, empty splits, ...)
    n_reused: int = 0                 # records taken from committed shards (a resumed run)


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
        Where shards go (a folder or an fsspec URL; default ``OUT/.shards``).
        Re-running the same command reuses committed shards whose inputs are unchanged.
    dask : str, optional
        A dask.distributed scheduler address, or ``"local"`` for a LocalCluster with one worker
        process per core; records are then processed as cluster tasks.

    Raises :class:`ConfigError` for problems found before any record is read (bad config, an
    input that matches nothing, a lead or class named that no record has, an output folder in
    the way). Record failures never raise: they are reported in ``records.parquet`` and the
    summary's exit code.
    """
    cfg = (config or Config()).validate()
    if csv_fs:
        cfg = cfg.replace(read={"csv_fs_hz": float(csv_fs)})
    out = Path(out)
    mapping, pmap, extra = resolve_extras(cfg)
    cfg = check_train_classes(cfg, mapping)
    found = _find(sources, cfg)
    axis, gaps = lead_axis(found, cfg)
    cfg = cfg.replace(leads={"select": axis})  # the resolved axis is what the hash covers
    chash = cfg.sha256(extra)
    prepare_out(out, overwrite, chash, [str(s.path) for s in found])
    # workers start (and warm up) while the parent hashes the inputs
    n_pool = min(n_workers(workers), len(found))
    pool = start_pool(n_pool) if not dask and n_pool > 1 else None
    try:
        inputs = [_inputs_or_empty(s, cfg) for s in found]
    except BaseException:
        if pool is not None:
            pool.shutdown(cancel_futures=True)
        raise
    job = _Job(found, inputs, cfg, axis, mapping, str(shards) if shards else str(out / ".shards"),
               _shard_hash(json.dumps({"config": chash, "axis": axis})))
    results, n_reused = _process(job, workers, dask, pool, progress)
    prov = Provenance([str(s) for s in sources], [str(s.path) for s in found], mapping, pmap,
                      extra, gaps)
    summary = _summary(out, _write(out, results, cfg, axis, prov))
    summary.n_reused = n_reused
    return summary


@dataclass
class _Job:
    """The records of a run and what each worker task needs besides its record."""

    found: list[Source]
    inputs: list[list]
    cfg: Config
    axis: list[str]
    mapping: dict
    root: str   # where shards go
    key: str    # the shard key: configuration and lead axis


def _find(sources: list[str | Path], cfg: Config) -> list[Source]:
    """The records named by the user's arguments; an argument matching nothing is an error."""
    notes: list[str] = []
    found, problems = find_sources(list(sources), notes=notes, csv_rate=bool(cfg.read.csv_fs_hz))
    for n in notes:
        log.warning("%s", n)
    if problems or not found:
        raise ConfigError(problems or ["no input records given"])
    return found


def _process(job: _Job, workers, dask, pool, progress) -> tuple[list[RecordResult], int]:
    """Every record's result: committed shards reused, the others processed (in workers or on
    a cluster, short records in batches) and read back from their shards; and how many were
    reused."""
    found, n = job.found, len(job.found)
    results: list = [None] * n
    todo, done = [], 0
    index = ShardIndex(job.root)
    for i, src in enumerate(found):
        cached = index.read(src.name, job.key, job.inputs[i], tables=False)
        if cached is None:
            todo.append(i)
            continue
        results[i] = cached
        done += 1
        if progress:
            progress(cached, done, n)
    if n - len(todo):
        log.info("reused %d committed shard%s of %d records", n - len(todo),
                 "" if n - len(todo) == 1 else "s", n)
    sizes = _input_sizes(todo, found, job.inputs)
    if dask or pool is not None:
        todo = _largest_first(todo, sizes)
    batches = _batches(todo, sizes, n_workers(workers))
    tasks = [([found[i] for i in b], job.cfg, job.axis, job.mapping, job.root, job.key,
              [job.inputs[i] for i in b]) for b in batches]
    for batch, errors in zip(batches, execute(_shard_task, tasks, workers, dask, pool)):
        folder = shard_folder([found[i].name for i in batch])
        index.forget(folder)
        for k, i in enumerate(batch):
            done += 1
            error = errors[k] if isinstance(errors, list) else errors
            res = index.read(found[i].name, job.key, job.inputs[i], tables=False, folder=folder)
            if res is None:  # the worker died before committing: report, never trust half a shard
                res = RecordResult(found[i].name, "failed", error=error or "the worker "
                                   "processing this record stopped before writing its results")
            if res.status == "failed":
                log.warning("%s: %s", res.name, res.error)
            results[i] = res
            if progress:
                progress(res, done, n)
    return results, n - len(todo)


def _write(out: Path, results: list[RecordResult], cfg: Config, axis: list[str],
           prov: Provenance) -> Assembled:
    """Assemble the dataset in a staging folder beside ``out``, then swap it in."""
    staging = out / f".staging-{os.getpid()}"
    shutil.rmtree(staging, ignore_errors=True)
    try:
        staging.mkdir(parents=True)

        def alloc(name, shape, dtype):
            if int(np.prod(shape)) == 0:
                return np.zeros(shape, dtype)
            return NpyWriter(staging / name, shape, dtype)

        a = assemble(results, cfg, axis, prov, alloc=alloc, tables_to=staging)
        write_assembled(staging, a)
        swap_in(staging, out)
    finally:
        if not (out / JOURNAL).exists():  # else the staged files finish the swap next time
            shutil.rmtree(staging, ignore_errors=True)
    return a


def lead_axis(found: list[Source], cfg: Config) -> tuple[list[str], dict[str, list[str]]]:
    """The lead axis (the configuration's, aliases resolved, or the leads at least half of the
    records have) and, per record, the axis leads it lacks (their slots are masked).

    A lead the user names that no record has is an error naming the nearest lead; so is a
    collection none of whose records can be read (with the first record's own message)."""
    errors: list[str] = []
    peeks = {s.name: source_leads(s, cfg.read, errors) for s in found}
    known = [x for x in peeks.values() if x]
    if not known:
        raise ConfigError(f"no record could be read ({len(found)} tried); the first says: "
                          f"{errors[0] if errors else 'no ECG lead'}")
    present = sorted({lead for x in known for lead in x}, key=str.lower)
    if cfg.leads.select:
        axis = resolve_axis(cfg.leads.select)
        twice = sorted({a for a in axis if axis.count(a) > 1})
        if twice:
            raise ConfigError(f"--leads / leads.select {','.join(cfg.leads.select)}: "
                              f"{', '.join(twice)} is named twice (aliases such as MLII and II "
                              "are one lead); give each lead once")
        absent = [a for a in axis if all(match_lead(a, x) is None for x in known)]
        if absent:
            hints = [f"{a} (did you mean {nearest_lead(a, present)}?)" if nearest_lead(a, present)
                     else a for a in absent]
            raise ConfigError(f"--leads / leads.select: {', '.join(hints)} is in no record; the "
                              f"records have {', '.join(present)}")
    else:
        axis = default_axis(known) or _most_common(known)
    gaps = {name: [a for a in axis if match_lead(a, x) is None]
            for name, x in peeks.items() if x}
    return axis, {k: v for k, v in gaps.items() if v}


def _most_common(known: list[list[str]]) -> list[str]:
    """When no lead is in half of the records (names that disagree): the most common leads, so
    that one record's naming never stops a batch; the records lacking them are named in the
    manifest's warnings."""
    top = max(lead_counts(known).values())
    axis = default_axis(known, min_share=top / len(known))
    log.warning("no ECG lead is in at least half of the records; the lead axis is the most "
                "common, %s (choose it with --leads)", ",".join(axis))
    return axis


def check_train_classes(cfg: Config, mapping: dict) -> Config:
    """Training classes matched case-insensitively to the classes in use (the AAMI table, the
    mapping file's classes and 'unlabeled'); an unknown one is an error naming the nearest."""
    if not cfg.labels.train_classes:
        return cfg
    classes = sorted(set(AAMI_CLASSES.values()) | set(mapping.values()) | {UNLABELED})
    by_lower = {c.lower(): c for c in classes}
    picked, bad = [], []
    for c in cfg.labels.train_classes:
        hit = by_lower.get(c.strip().lower())
        (picked.append(hit) if hit else bad.append(c))
    if bad:
        hints = [f"{b!r}" + (f" (did you mean {m}?)" if (m := nearest_lead(b, classes, 0.3))
                             else "") for b in bad]
        raise ConfigError(f"--train-classes / labels.train_classes: {', '.join(hints)} is not a "
                          f"class in use; the classes are {', '.join(classes)}")
    return cfg.replace(labels={"train_classes": picked})


def _input_sizes(todo: list[int], found: list[Source], inputs: list) -> dict[int, int]:
    """Bytes of each record's input files (0 for those that cannot be read)."""
    def size(i: int) -> int:
        total = 0
        for name, _ in inputs[i]:
            try:
                total += (found[i].path.parent / name).stat().st_size
            except OSError:
                pass
        return total
    return {i: size(i) for i in todo}


def _largest_first(todo: list[int], sizes: dict[int, int]) -> list[int]:
    """Record indices ordered by the size of their input files, largest first (ties keep the
    input order). Parallel workers then take long records early: a 24-hour record started last
    would leave every other worker idle while it runs. The dataset does not depend on this
    order."""
    return sorted(todo, key=lambda i: -sizes[i])


SMALL_RECORD_BYTES = 1 << 20  # records whose input files total at most this are batched
MAX_BATCH = 64                # records per batch at most


def _batches(todo: list[int], sizes: dict[int, int], workers: int) -> list[list[int]]:
    """The worker tasks: one per record larger than SMALL_RECORD_BYTES (a 30-min two-lead
    record is about 2 MB, a 10-s 12-lead one about 120 kB), and the small records in batches
    of consecutive records, one shard each. A batch holds at most MAX_BATCH records and the
    small records make at least 8 batches per worker where there are enough of them, so that
    the last batch is a small share of a worker's work (load balance; common practice, no
    source). The dataset does not depend on the batches."""
    big = [[i] for i in todo if sizes.get(i, 0) > SMALL_RECORD_BYTES]
    small = [i for i in todo if sizes.get(i, 0) <= SMALL_RECORD_BYTES]
    per = max(1, min(MAX_BATCH, -(-len(small) // (8 * max(1, workers)))))
    return big + [small[k:k + per] for k in range(0, len(small), per)]


def _shard_hash(key: str) -> str:
    return hashlib.sha256(key.encode()).hexdigest()


def _inputs_or_empty(src: Source, cfg: Config) -> list:
    try:
        return source_inputs(src, cfg.read)
    except OSError:
        return []


@lru_cache(maxsize=1)
def _thread_pools():
    """The process's thread-pool controller, made once (it scans the loaded libraries: about
    4 ms, which a short record's task would otherwise pay each time); made after the signal
    stack is imported, so it knows every BLAS library the stages use."""
    from threadpoolctl import ThreadpoolController
    return ThreadpoolController()


def _shard_task(args) -> list[str]:
    """Process a batch of records and write their shard (in a worker process or on a Dask
    worker); returns each record's error text ('' when fine)."""
    from prep.pipeline.chunks import beats_of_source
    sources, cfg, axis, mapping, root, key, inputs = args
    results = []
    # one BLAS thread per task: N worker processes then use N cores, not N x BLAS threads, and
    # the results cannot depend on how many threads a matrix product was split over
    with _thread_pools().limit(limits=1):
        for src, ins in zip(sources, inputs):
            try:
                res = beats_of_source(src, cfg, axis, mapping, [tuple(x) for x in ins] or None)
            except Exception as exc:  # noqa: BLE001 - one record's failure, not its batch's
                res = RecordResult(src.name, "failed", error=f"unexpected {type(exc).__name__}: "
                                   f"{exc}")
            if ins and not res.inputs:  # a record that failed still names its files
                res.inputs = [tuple(x) for x in ins]
            results.append(res)
    write_shard(root, results, key, inputs)
    return [r.error for r in results]


def resolve_extras(cfg: Config) -> tuple[dict, dict, dict]:
    """Files the config names, read now: symbol map, patient map, and their hash contribution."""
    mapping = load_mapping(cfg.labels.mapping_file)
    pmap = load_patient_map(cfg.split.patient_map)
    return mapping, pmap, {"labels.mapping": mapping, "split.patient_map": pmap}


def _summary(out: Path, a: Assembled) -> RunSummary:
    c = a.manifest["counts"]
    return RunSummary(out, c["records"], c["records_failed"], c["records_no_usable_lead"],
                      c["beats"], c["beats_kept"], a.manifest["lead_axis"], a.exit_code,
                      a.manifest["splits"], a.manifest.get("class_yield"),
                      a.manifest.get("warnings"))


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
