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

from prep.config import Config
from prep.dataset.assemble import Assembled, Provenance, assemble, write_assembled
from prep.dataset.execute import execute, n_workers, start_pool
from prep.dataset.export import NpyWriter
from prep.dataset.folder import prepare_out, swap_in
from prep.dataset.shards import read_shard, write_shard
from prep.dataset.split import load_patient_map
from prep.errors import ConfigError
from prep.io.sources import Source, find_sources, source_inputs, source_leads
from prep.leads import default_axis, resolve_axis
from prep.pipeline.result import RecordResult
from prep.stages.labels import load_mapping

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
    mapping, pmap, extra = resolve_extras(cfg)
    found, problems = find_sources(list(sources))
    if not found:
        raise ConfigError(problems or ["no input records given"])
    for p in problems:
        log.warning("%s", p)
    chash = cfg.sha256(extra)
    root = str(shards) if shards else str(out / ".shards")
    prepare_out(out, overwrite, chash)
    # workers start (and warm up) while the parent reads headers and hashes the inputs
    n_pool = min(n_workers(workers), len(found))
    pool = start_pool(n_pool) if not dask and n_pool > 1 else None
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
    for i, error in zip(todo, execute(_shard_task, tasks, workers, dask, pool)):
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

        prov = Provenance([str(s) for s in sources], [str(s.path) for s in found], mapping, pmap,
                          extra)
        a = assemble(results, cfg, axis, prov, alloc=alloc, tables_to=staging)
        write_assembled(staging, a)
        swap_in(staging, out)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return _summary(out, a)


def _axis_and_inputs(found: list[Source], cfg: Config) -> tuple[list[str], list]:
    """The lead axis (from the config or the records' headers) and each source's input files
    with their SHA-256 (a committed shard is reused only for unchanged inputs)."""
    if cfg.leads.select:
        axis = resolve_axis(cfg.leads.select)
    else:
        peeks = [lp for lp in (source_leads(s, cfg.read) for s in found) if lp]
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
    from threadpoolctl import threadpool_limits

    from prep.pipeline.chunks import beats_of_source
    src, cfg, axis, mapping, root, key, inputs = args
    # one BLAS thread per task: N worker processes then use N cores, not N x BLAS threads, and
    # the results cannot depend on how many threads a matrix product was split over
    with threadpool_limits(limits=1):
        res = beats_of_source(src, cfg, axis, mapping, [tuple(x) for x in inputs] or None)
    if inputs and not res.inputs:  # a record that failed still names the files it came from
        res.inputs = [tuple(x) for x in inputs]
    write_shard(root, res, key, inputs)
    return res.error


def resolve_extras(cfg: Config) -> tuple[dict, dict, dict]:
    """Files the config names, read now: symbol map, patient map, and their hash contribution."""
    mapping = load_mapping(cfg.labels.mapping_file)
    pmap = load_patient_map(cfg.split.patient_map)
    return mapping, pmap, {"labels.mapping": mapping, "split.patient_map": pmap}


def _summary(out: Path, a: Assembled) -> RunSummary:
    c = a.manifest["counts"]
    return RunSummary(out, c["records"], c["records_failed"], c["records_no_usable_lead"],
                      c["beats"], c["beats_kept"], a.manifest["lead_axis"], a.exit_code,
                      a.manifest["splits"], a.manifest.get("class_yield"))


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
