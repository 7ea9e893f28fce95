"""Consolidation's table pass: every record's beat and window rows, in input order, with the
split rules' exclusions and final tensor rows written in (pyarrow, no DataFrame per record);
the records and leads tables."""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from prep.dataset.plan import Plan, final_rows
from prep.dataset.sinks import ParquetRows, Rows, beats_arrow, beats_schema, windows_arrow
from prep.dataset.split import SPLITS
from prep.pipeline.result import RecordResult
from prep.quality import reasons as reasons_mod
from prep.schema import BEATS_TABLE, WINDOWS_TABLE, empty_beats

_WINDOW_COLUMNS = ["record", "lead", "start", "end", "grade", "decided_by"]  # of an empty table
_LEAD_COLUMNS = ("record", "lead", "source_name", "used", "reason", "in_axis")


@dataclass
class Tables:
    """The beat and window tables (None: streamed into their files) and what the manifest
    counts from them."""

    beats: pd.DataFrame | None
    windows: pd.DataFrame | None
    reason_counts: dict[str, int]
    split_classes: dict[str, dict[str, int]]   # kept beats per class in each split
    n_beats: int


def tabulate(results: list[RecordResult], plan: Plan, tables_to: Path | None) -> Tables:
    """Beat and window rows of every record in input order; with ``tables_to`` (a folder)
    beats.parquet and windows.parquet are streamed there."""
    import pyarrow as pa
    import pyarrow.compute as pc
    schema_b = beats_schema()
    sink_b = ParquetRows(tables_to / BEATS_TABLE, schema_b) if tables_to else Rows()
    sink_w = ParquetRows(tables_to / WINDOWS_TABLE) if tables_to else Rows()
    reason_counts: dict[str, int] = {}
    split_classes: dict[str, dict[str, int]] = {s: {} for s in SPLITS}
    n_beats = 0
    for k, (r, place) in enumerate(zip(results, plan.places)):
        t = beats_arrow(r, schema_b)
        cols = {c: t.column(c).to_numpy(zero_copy_only=False)
                for c in ("included", "beat_class", "r_sample")}
        more = plan.rule_reasons(k, cols)
        t = _with_rule_exclusions(t, cols, more)
        rows = final_rows(cols, more)
        ti = np.full(t.num_rows, -1, np.int64)
        ti[rows] = place.offset + np.arange(rows.size)
        t = t.set_column(t.schema.get_field_index("tensor_index"), "tensor_index", pa.array(ti))
        for d in pc.value_counts(t.column("reasons")).to_pylist():  # a few distinct cells
            for c in filter(None, (d["values"] or "").split(";")):
                reason_counts[c] = reason_counts.get(c, 0) + int(d["counts"])
        if place.split in split_classes and rows.size:
            sc = split_classes[place.split]
            for d in pc.value_counts(t.column("beat_class").take(pa.array(rows))).to_pylist():
                if d["values"] is not None:
                    sc[str(d["values"])] = sc.get(str(d["values"]), 0) + int(d["counts"])
        n_beats += t.num_rows
        t = t.append_column("patient", pa.array([place.patient] * t.num_rows, pa.string()))
        sink_b.add(t.append_column("split", pa.array([place.split] * t.num_rows, pa.string())))
        w = windows_arrow(r)
        if w is not None:
            sink_w.add(w)
        del t, w
    empty_b = empty_beats()
    empty_b["patient"], empty_b["split"] = pd.Series(dtype="str"), pd.Series(dtype="str")
    windows = sink_w.finish(pd.DataFrame({c: pd.Series(dtype="float64") for c in _WINDOW_COLUMNS}))
    return Tables(sink_b.finish(empty_b), windows, reason_counts, split_classes, n_beats)


def _with_rule_exclusions(t, cols: dict, more: np.ndarray):
    """Where the split settings exclude kept beats, say why in their rows (reasons, flags
    cleared, included False)."""
    import pyarrow as pa
    hit = more != ""
    if not hit.any():
        return t
    reasons = t.column("reasons").to_numpy(zero_copy_only=False).astype(object)
    flags = t.column("beat_flags").to_numpy(zero_copy_only=False).astype(object)
    reasons[hit] = [reasons_mod.join([c]) for c in more[hit]]
    flags[hit] = ""
    inc = cols["included"].astype(bool)
    inc[hit] = False
    for name, v, typ in (("reasons", reasons, pa.string()), ("beat_flags", flags, pa.string()),
                         ("included", inc, pa.bool_())):
        t = t.set_column(t.schema.get_field_index(name), name, pa.array(v, typ))
    return t


def leads_table(results: list[RecordResult]) -> pd.DataFrame:
    """One row per record and lead: used or not, and why."""
    rows = [row for r in results for row in r.leads]
    return pd.DataFrame(rows) if rows else pd.DataFrame({c: [] for c in _LEAD_COLUMNS})


def records_table(results: list[RecordResult], plan: Plan) -> pd.DataFrame:
    """One row per record: status, rate, length, beats, kept beats, patient, split, inputs."""
    return pd.DataFrame({
        "record": [r.name for r in results], "status": [r.status for r in results],
        "error": [r.error for r in results], "fs": [float(r.fs) for r in results],
        "duration_s": [float(r.duration_s) for r in results],
        "n_leads": [int(r.n_leads) for r in results],
        "n_beats": [p.n_beats for p in plan.places],
        "n_kept": [p.n_final for p in plan.places],
        "patient": plan.patients, "split": [p.split for p in plan.places],
        "warnings": ["; ".join(r.warnings) for r in results],
        "inputs": [[{"file": f, "sha256": h} for f, h in r.inputs] for r in results]})
