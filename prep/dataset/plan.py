"""Where each record's beats go: patients, splits, split rules and tensor rows (consolidation's
first pass, from a few numbers per record; no table is held)."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from prep.config import Config
from prep.dataset.shards import kept_summary
from prep.dataset.sinks import columns_of
from prep.dataset.split import SPLITS, assign_patients, fixed_assignment, patient_of
from prep.pipeline.result import RecordResult

_SPLIT_RANK = {"train": 0, "val": 1, "test": 2}


@dataclass
class Place:
    """What consolidation keeps of one record between its passes: a few numbers, no table."""

    patient: str
    split: str
    n_beats: int
    kept: dict          # kept beats per class (NaN class under key None), before split rules
    n_final: int = 0    # kept beats after the split rules
    offset: int = 0     # first tensor row of the record


@dataclass
class Plan:
    """The whole dataset's layout: one :class:`Place` per record, the tensor order of records
    (``order``: record indices), each split's row range and the split rules in force."""

    places: list[Place]
    order: list[int]
    ranges: dict[str, list[int]]
    n_total: int
    fixed: bool                     # fixed patient lists given: patients in none are excluded
    train_classes: set = field(default_factory=set)

    @property
    def patients(self) -> list[str]:
        return [p.patient for p in self.places]

    def rules_apply(self, k: int) -> bool:
        return rules_apply(self.places[k].split, self.fixed, self.train_classes)

    def rule_reasons(self, k: int, b) -> np.ndarray:
        return rule_reasons(b, self.places[k].split, self.fixed, self.train_classes)


def kept_classes(r: RecordResult) -> dict:
    """Kept beats per class (unlabeled under None): from the shard's summary when it has one,
    else summarized here from the beat table."""
    kept = r.store.kept if r.beats is None and r.store is not None else None
    if kept is None:
        kept = kept_summary(pd.DataFrame(columns_of(
            r, ["included", "beat_class", "r_sample", "tensor_index"])))
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
        off = inc & ~np.isin(np.asarray(b["beat_class"], dtype=object), sorted(train_classes))
        extra[off] = "not_train_class"
    return extra


def final_rows(b, extra: np.ndarray) -> np.ndarray:
    """Positions in ``b`` of the beats that reach the tensor, in tensor order (time)."""
    idx = np.flatnonzero(np.asarray(b["included"], bool) & (extra == ""))
    return idx[np.argsort(np.asarray(b["r_sample"])[idx], kind="stable")]


def plan_dataset(results: list[RecordResult], cfg: Config, pmap: dict) -> Plan:
    """Patients and splits from kept beats per class, then the tensor rows of every record:
    split, then patient, then record and time."""
    patients = [patient_of(r.name, r.comments, pmap, cfg.split.patient_pattern) for r in results]
    places = [Place(p, "", r.n_beats, kept_classes(r)) for r, p in zip(results, patients)]
    sp = cfg.split
    fixed = bool(sp.train_patients or sp.val_patients or sp.test_patients)
    ok = [r.status == "ok" for r in results]  # a failed record takes no split (nor a slot)
    usable = [pl for pl, good in zip(places, ok) if good]
    split_of = (fixed_assignment(sorted({pl.patient for pl in usable}), sp.train_patients,
                                 sp.val_patients, sp.test_patients) if fixed
                else assign_patients(_kept_per_patient(usable), sp.ratios, sp.seed))
    train_classes = set(cfg.labels.train_classes)
    for place, good in zip(places, ok):
        place.split = split_of.get(place.patient, "") if good else ""
        if fixed and not place.split:
            place.n_final = 0
        elif place.split == "train" and train_classes:
            place.n_final = sum(v for k, v in place.kept.items() if k in train_classes)
        else:
            place.n_final = sum(place.kept.values())
    order = sorted((k for k, place in enumerate(places) if place.n_final),
                   key=lambda k: (_SPLIT_RANK.get(places[k].split, 3), places[k].patient,
                                  results[k].name, k))
    ranges, n_total = _place_rows(places, order)
    return Plan(places, order, ranges, n_total, fixed, train_classes)


def _kept_per_patient(places: list[Place]) -> dict[str, dict[str, int]]:
    counts: dict[str, dict[str, int]] = {}
    for place in places:
        c = counts.setdefault(place.patient, {})
        for k, v in place.kept.items():
            if k is not None:
                c[k] = c.get(k, 0) + v
    return counts


def _place_rows(places: list[Place], order: list[int]) -> tuple[dict[str, list[int]], int]:
    """Each record's first tensor row, in ``order``; each split's [first, end) rows."""
    at = 0
    ranges = {s: [0, 0] for s in SPLITS}
    for k in order:
        places[k].offset = at
        at += places[k].n_final
        rg = ranges.get(places[k].split)
        if rg is not None:
            if rg == [0, 0]:
                rg[0] = places[k].offset
            rg[1] = at
    return ranges, at
