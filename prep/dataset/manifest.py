"""The manifest: configuration, environment, lead axis, tensor layout, labels, splits, class
yield, inputs, counts and every record's stage logs (file checksums are added when written)."""
from __future__ import annotations

from collections.abc import Mapping

import pandas as pd

from prep import __version__
from prep.config import Config
from prep.dataset.export import environment
from prep.dataset.plan import Plan
from prep.dataset.split import SPLITS
from prep.dataset.tables import Tables
from prep.pipeline.result import RecordResult
from prep.schema import BEATS_NPY
from prep.stages.labels import AAMI_CLASSES, UNLABELED


def build_manifest(results: list[RecordResult], cfg: Config, axis: list[str], prov,
                   plan: Plan, tables: Tables, tensor_shape: tuple, norm_note: str,
                   yield_section: dict) -> dict:
    """Everything a dataset's manifest says, but its files' checksums. ``prov``: the run's
    :class:`prep.dataset.assemble.Provenance`."""
    n_failed = sum(r.status == "failed" for r in results)
    n_nolead = sum(r.status == "no_usable_lead" for r in results)
    n_kept = int(tensor_shape[0])
    return {
        "tool": {"name": "beatmill", "version": __version__},
        "config_sha256": cfg.sha256(prov.extra),
        "config": cfg.to_dict(),
        "resolved_files": prov.extra,
        "environment": environment(),
        "lead_axis": axis,
        "lead_axis_gaps": dict(sorted(prov.axis_gaps.items())),
        "tensor": {"file": BEATS_NPY, "shape": list(tensor_shape), "dtype": "float32",
                   "order": "C", "axes": ["beat", "lead", "sample"],
                   "row_order": "split (train, val, test), then patient, record and time",
                   "normalization": {"method": cfg.normalize.method, "scope": cfg.normalize.scope,
                                     "statistics_from": norm_note,
                                     "invert": "beat_mv = beats * norm_scale[..., None] + "
                                               "norm_center[..., None]"}},
        "labels": {"window_ms": cfg.labels.window_ms,
                   "classes": {**AAMI_CLASSES, **prov.mapping}, "unlabeled": UNLABELED,
                   "train_classes": sorted(plan.train_classes)},
        "splits": _splits(plan, tables),
        "warnings": dataset_warnings(plan, tables, prov.axis_gaps, axis, yield_section),
        "class_yield": yield_section,
        "inputs": {"given": prov.given, "records": prov.record_paths},
        "counts": {"records": len(results), "records_ok": len(results) - n_failed - n_nolead,
                   "records_failed": n_failed, "records_no_usable_lead": n_nolead,
                   "beats": int(tables.n_beats), "beats_kept": n_kept,
                   "beats_excluded": int(tables.n_beats - n_kept),
                   "excluded_by_reason": dict(sorted(tables.reason_counts.items()))},
        "records": (RecordsSection(results) if any(r.store is not None for r in results)
                    else dict(RecordsSection(results))),  # in-memory results: a plain dict
    }


#: classes an anomaly model is meant to find (AAMI EC57 classes other than N and Q)
_ABNORMAL = ("S", "V", "F")


def dataset_warnings(plan: Plan, tables: Tables, gaps: dict, axis: list[str],
                     yield_section: dict) -> list[str]:
    """What a user should know before training: records lacking axis leads, empty splits, and
    (where reference labels exist) validation or test splits without any abnormal beat."""
    out = []
    none = sorted(n for n, lacks in gaps.items() if len(lacks) == len(axis))
    if none:
        shown = ", ".join(none[:10]) + (f" and {len(none) - 10} more" if len(none) > 10 else "")
        out.append(f"{len(none)} of {len(plan.places)} records have none of the axis leads "
                   f"{','.join(axis)}, so all their beats are excluded (lead_missing): {shown}; "
                   "choose the axis with --leads (aliases such as MLII count), or run those "
                   "records as a dataset of their own")
        gaps = {n: v for n, v in gaps.items() if n not in none}
    if gaps:
        names = sorted(gaps)
        shown = "; ".join(f"{n} lacks {', '.join(gaps[n])}" for n in names[:10])
        more = f"; and {len(names) - 10} more records" if len(names) > 10 else ""
        out.append(f"{len(names)} of {len(plan.places)} records lack a lead of the axis "
                   f"{','.join(axis)} (its slots are masked, lead_mask False): {shown}{more}")
    labelled = bool(yield_section.get("records_with_reference"))
    for s in SPLITS:
        beats = plan.ranges[s][1] - plan.ranges[s][0]
        if not beats:
            out.append(f"the {s} split holds no beat")
        elif labelled and s != "train" and not any(
                tables.split_classes[s].get(c) for c in _ABNORMAL):
            out.append(f"the {s} split holds no abnormal beat (S, V, F): a model cannot be "
                       "tested there on the anomalies it is meant to find; add records or fix "
                       "the split (split.ratios, split.seed, split.*_patients)")
    return out


def _splits(plan: Plan, tables: Tables) -> dict:
    return {s: {"rows": plan.ranges[s], "beats": int(plan.ranges[s][1] - plan.ranges[s][0]),
                "patients": sorted(set(p.patient for p in plan.places if p.split == s)),
                "classes": dict(sorted(tables.split_classes[s].items()))} for s in SPLITS}


#: an abnormal class is "clearly" kept less than N when its kept share is this much lower and it
#: has at least _YIELD_MIN_BEATS reference beats (design choice, no source)
_YIELD_GAP = 0.05
_YIELD_MIN_BEATS = 20


def class_yield(results: list[RecordResult], places: list, records: pd.DataFrame) -> dict:
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


class RecordsSection(Mapping):
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
