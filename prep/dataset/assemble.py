"""Consolidation: split, order, normalize and tabulate processed records into one dataset."""
from __future__ import annotations

import logging
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from prep import __version__
from prep.config import Config
from prep.dataset.export import (MANIFEST, TABLE_FILES, TENSOR_FILES, NpyWriter, environment,
                                 write_manifest, write_npy, write_parquet)
from prep.dataset.shards import kept_summary
from prep.dataset.sinks import (ParquetRows, Rows, beats_arrow, beats_schema, columns_of,
                                windows_arrow)
from prep.dataset.split import SPLITS, assign_patients, fixed_assignment, patient_of
from prep.dataset.stats import BATCH, lead_stats
from prep.errors import EXIT_NONE_USABLE, EXIT_OK, EXIT_SOME_FAILED
from prep.io._files import sha256_file
from prep.pipeline.record import RecordResult
from prep.quality import reasons as reasons_mod
from prep.schema import empty_beats
from prep.stages.labels import AAMI_CLASSES, UNLABELED
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


@dataclass
class _Part:
    """What consolidation keeps of one record between its passes: a few numbers, no table."""

    patient: str
    split: str
    n_beats: int
    kept: dict          # kept beats per class (NaN class under key None), before split rules
    n_final: int = 0    # kept beats after the split rules
    offset: int = 0     # first tensor row of the record


def kept_classes(r: RecordResult) -> dict:
    """Kept beats per class (unlabeled under None): from the shard's summary when it has one,
    else summarized here from the beat table."""
    kept = r.store.kept if r.beats is None and r.store is not None else None
    if kept is None:
        kept = kept_summary(pd.DataFrame(columns_of(
            r, ["included", "class", "r_sample", "tensor_index"])))
    return {k: int(v) for k, v in kept["classes"]}


def rules_apply(split: str, fixed: bool, train_classes: set) -> bool:
    """Whether the split settings may exclude some of a record's kept beats
    (see :func:`rule_reasons`)."""
    return (fixed and not split) or (split == "train" and bool(train_classes))


def rule_reasons(b, split: str, fixed: bool, train_classes: set) -> np.ndarray:
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


def final_rows(b, extra: np.ndarray) -> np.ndarray:
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
    parts = [_Part(p, "", r.n_beats, kept_classes(r)) for r, p in zip(results, patients)]
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
        if kept and kept["in_order"] and not rules_apply(parts[k].split, fixed, train_classes):
            return np.arange(results[k].tensor.shape[0])  # no table read needed
        b = columns_of(results[k], ["included", "class", "r_sample", "tensor_index"])
        rows = final_rows(b, rule_reasons(b, parts[k].split, fixed, train_classes))
        return np.asarray(b["tensor_index"])[rows]

    tensor, mask, center, scale, norm_note = _gather_normalized(
        results, [(k, parts[k].split) for k in order], local_rows, n_total, cfg, n_ax, n_s, alloc)

    # ---- pass 4: tables, record by record in input order (pyarrow, no DataFrame) ---------
    import pyarrow as pa
    import pyarrow.compute as pc
    schema_b = beats_schema()
    sink_b = ParquetRows(tables_to / "beats.parquet", schema_b) if tables_to else Rows()
    sink_w = ParquetRows(tables_to / "windows.parquet") if tables_to else Rows()
    reason_counts: dict[str, int] = {}
    split_classes = {s: {} for s in SPLITS}
    n_beats_all = 0
    for k, (r, part) in enumerate(zip(results, parts)):
        t = beats_arrow(r, schema_b)
        n = t.num_rows
        cols = {c: t.column(c).to_numpy(zero_copy_only=False)
                for c in ("included", "class", "r_sample")}
        more = rule_reasons(cols, part.split, fixed, train_classes)
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
        rows = final_rows(cols, more)
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
        w = windows_arrow(r)
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
