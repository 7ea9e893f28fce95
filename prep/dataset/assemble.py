"""Consolidation: split, order, normalize and tabulate processed records into one dataset
(the plan in plan.py, the table pass in tables.py, the manifest in manifest.py)."""
from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from prep.config import Config
from prep.dataset.export import NpyWriter, write_manifest, write_npy, write_parquet
from prep.dataset.manifest import build_manifest, class_yield
from prep.dataset.plan import final_rows, plan_dataset
from prep.dataset.sinks import columns_of
from prep.dataset.stats import BATCH, lead_stats
from prep.dataset.tables import leads_table, records_table, tabulate
from prep.errors import EXIT_NONE_USABLE, EXIT_OK, EXIT_SOME_FAILED
from prep.io._files import sha256_file
from prep.pipeline.result import RecordResult
from prep.schema import (BEATS_NPY, BEATS_TABLE, LEAD_MASK_NPY, LEADS_TABLE, MANIFEST,
                         NORM_CENTER_NPY, NORM_SCALE_NPY, RECORDS_TABLE, TABLE_FILES, TENSOR_FILES,
                         WINDOWS_TABLE)
from prep.stages.normalize import apply_stats, normalize

log = logging.getLogger("prep")


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


@dataclass(frozen=True)
class Provenance:
    """What a dataset was made from, beyond its records' results."""

    given: list[str]          # the user's input arguments
    record_paths: list[str]   # each record's path, in result order
    mapping: dict             # symbol -> class overrides (labels.mapping_file)
    pmap: dict                # record -> patient (split.patient_map)
    extra: dict               # contents of files the configuration names (part of its hash)
    axis_gaps: dict = field(default_factory=dict)  # record -> axis leads it lacks (masked)


def assemble(results: list[RecordResult], cfg: Config, axis: list[str], prov: Provenance,
             alloc=None, tables_to: Path | None = None) -> Assembled:
    """Split, order, normalize and tabulate processed records into one dataset.

    ``alloc(name, shape, dtype)`` provides the output arrays (default: in memory); the writer
    passes memory-mapped files. With ``tables_to`` (a folder), beats.parquet and
    windows.parquet are streamed there. Records are visited one at a time in a few passes
    (class counts and placement, normalization statistics, tensor, tables), and tables left in
    shards (``RecordResult.store``) are read only while their record is visited, so peak memory
    does not grow with the number of records. Class counts and, where no split rule drops beats,
    tensor placement come from each shard's kept-beat summary without a table read; the
    tables pass works on pyarrow Tables (no DataFrame per record).
    """
    alloc = alloc or (lambda name, shape, dtype: np.zeros(shape, dtype))
    n_ax, n_s = len(axis), cfg.resample.n_samples
    for r in results:  # failed records contribute empty arrays of the right shape
        if r.tensor is None:
            r.tensor = np.zeros((0, n_ax, n_s))
            r.mask = np.zeros((0, n_ax), bool)
    plan = plan_dataset(results, cfg, prov.pmap)

    def local_rows(k: int) -> np.ndarray:
        """Shard tensor rows of record k's final beats, in tensor order."""
        kept = results[k].store.kept if results[k].store is not None else None
        if kept and kept["in_order"] and not plan.rules_apply(k):
            return np.arange(results[k].tensor.shape[0])  # no table read needed
        b = columns_of(results[k], ["included", "beat_class", "r_sample", "tensor_index"])
        return np.asarray(b["tensor_index"])[final_rows(b, plan.rule_reasons(k, b))]

    tensor, mask, center, scale, norm_note = _gather_normalized(
        results, [(k, plan.places[k].split) for k in plan.order], local_rows, plan.n_total,
        cfg, (n_ax, n_s), alloc)
    tables = tabulate(results, plan, tables_to)
    records = records_table(results, plan)
    yield_section = class_yield(results, plan.places, records)
    manifest = build_manifest(results, cfg, axis, prov, plan, tables, tensor.shape, norm_note,
                              yield_section)
    n = manifest["counts"]
    usable = n["records_ok"]
    code = (EXIT_NONE_USABLE if usable == 0 else EXIT_SOME_FAILED if usable < len(results)
            else EXIT_OK)
    return Assembled(tensor, mask, center, scale, tables.beats, leads_table(results), records,
                     tables.windows, manifest, code)


def write_assembled(out: Path, a: Assembled) -> None:
    """Write an assembled dataset; the manifest, holding every file's SHA-256, comes last.
    Tensors and tables already streamed into ``out`` (see :func:`assemble`) are closed, not
    copied."""
    known = {}  # SHA-256 of tensors hashed while they were written
    for name, arr in ((BEATS_NPY, a.beats), (LEAD_MASK_NPY, a.lead_mask),
                      (NORM_CENTER_NPY, a.norm_center), (NORM_SCALE_NPY, a.norm_scale)):
        if isinstance(arr, NpyWriter) and arr.path.resolve() == (out / name).resolve():
            arr.close()
            if arr.sha256:
                known[name] = arr.sha256
        else:
            write_npy(out / name, arr)
    for name, df in ((BEATS_TABLE, a.table), (LEADS_TABLE, a.leads),
                     (RECORDS_TABLE, a.records), (WINDOWS_TABLE, a.windows)):
        if df is not None:
            write_parquet(out / name, df)
        elif not (out / name).exists():
            raise FileNotFoundError(f"{out / name}: the streamed table was not written")
    manifest = {**a.manifest,
                "files": {f: known.get(f) or sha256_file(out / f)
                          for f in TENSOR_FILES + TABLE_FILES}}
    write_manifest(out / MANIFEST, manifest)


def _gather_normalized(results: list[RecordResult], order: list[tuple[int, str]], local_rows,
                       n: int, cfg: Config, shape: tuple[int, int], alloc):
    """Copy kept beats into the output arrays in their final order, normalized, one record at a
    time (``order``: record index and split, in tensor order; ``local_rows(k)``: record k's
    shard rows in tensor order). Dataset statistics come from the training split."""
    m, scope = cfg.normalize.method, cfg.normalize.scope
    n_ax, n_s = shape
    tensor = alloc(BEATS_NPY, (n, n_ax, n_s), np.float32)
    mask = alloc(LEAD_MASK_NPY, (n, n_ax), np.bool_)
    center = alloc(NORM_CENTER_NPY, (n, n_ax), np.float32)
    scale = alloc(NORM_SCALE_NPY, (n, n_ax), np.float32)

    def rows(arr, li, dtype):
        # a memory-mapped shard is mapped afresh and unmapped after the read: pages touched
        # through a long-lived map would stay resident and peak memory would grow with records
        if isinstance(arr, np.memmap):
            fresh = np.memmap(arr.filename, arr.dtype, "r", arr.offset, arr.shape,
                              order="C" if arr.flags.c_contiguous else "F")
            out = np.asarray(fresh[li], dtype=dtype)
            del fresh
            return out
        return np.asarray(arr[li], dtype=dtype)

    def batches(k: int, li: np.ndarray):
        for i in range(0, li.size, BATCH):
            part = li[i:i + BATCH]
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
