"""Patient-wise train / validation / test splits. No patient is ever in two splits.

Pure functions over small tables; the dataset writer applies them after every record is
processed (the assignment needs every patient's beat counts).
"""
from __future__ import annotations

import csv
import re
from pathlib import Path

import numpy as np

from prep.errors import ConfigError

SPLITS = ("train", "val", "test")


def load_patient_map(path: str | None) -> dict[str, str]:
    """record -> patient from a CSV with columns record,patient."""
    if not path:
        return {}
    p = Path(path)
    if not p.exists():
        raise ConfigError(f"[split] patient_map {p} does not exist")
    try:
        with open(p, newline="", encoding="utf-8") as fh:
            rows = list(csv.DictReader(fh))
        out = {str(r["record"]).strip(): str(r["patient"]).strip() for r in rows}
    except (KeyError, UnicodeDecodeError, csv.Error) as exc:
        raise ConfigError(f"[split] patient_map {p}: needs CSV columns record,patient "
                          f"({type(exc).__name__}: {exc})") from None
    empty = [k for k, v in out.items() if not k or not v]
    if empty:
        raise ConfigError(f"[split] patient_map {p}: empty record or patient for {empty}")
    return out


def patient_of(record: str, comments: list[str], mapping: dict[str, str], pattern: str) -> str:
    """The patient of a record: the map, else the header pattern, else the record name.

    >>> patient_of("r1", ["age 60", "patient: P07"], {}, r"patient[: ]+(\\w+)")
    'P07'
    """
    if record in mapping:
        return mapping[record]
    if pattern:
        rx = re.compile(pattern)
        for c in comments:
            m = rx.search(c)
            if m and m.group(1):
                return m.group(1)
    return record


def assign_patients(counts: dict[str, dict[str, int]], ratios, seed: int) -> dict[str, str]:
    """Assign whole patients to splits, as close to the beat ratios and class balance as possible.

    ``counts``: patient -> {class: kept beats}. Patients are taken largest first (ties broken by
    a seeded shuffle) and each goes to the split whose beat total, and class totals, fall furthest
    below their targets. Deterministic for a seed. A split whose ratio is 0 gets no patient.

    >>> a = assign_patients({"p1": {"N": 10}, "p2": {"N": 10}, "p3": {"N": 10}}, [1, 1, 1], 0)
    >>> sorted(a.values())
    ['test', 'train', 'val']
    """
    r = np.asarray(ratios, dtype=float)
    r = r / r.sum()
    patients = sorted(counts)
    if not patients:
        return {}
    classes = sorted({c for v in counts.values() for c in v})
    m = np.array([[counts[p].get(c, 0) for c in classes] for p in patients], dtype=float)
    rng = np.random.default_rng(seed)
    tie = rng.permutation(len(patients))
    order = np.lexsort((tie, -m.sum(1)))
    total = m.sum(0)
    have = np.zeros((3, len(classes)))
    out: dict[str, str] = {}
    open_ = r > 0
    for i in order:  # one step per patient
        # deficit of each split after adding patient i, beats overall and per class
        tgt = r[:, None] * total[None, :]
        after = have + m[i][None, :]
        cost = np.zeros(3)
        for s in range(3):
            trial = have.copy()
            trial[s] = after[s]
            over = trial - tgt
            cost[s] = ((over.sum(1) / max(total.sum(), 1)) ** 2).sum() + \
                0.5 * ((over / np.maximum(total, 1)) ** 2).sum()
        # a split that is still empty while others are not gets the patient first
        empty = (have.sum(1) == 0) & open_
        cost[~open_] = np.inf
        if empty.any() and m[i].sum() <= (r * total.sum())[empty].max() + 1e-9:
            cost[~empty] = np.inf
        s = int(np.argmin(cost))
        have[s] += m[i]
        out[patients[i]] = SPLITS[s]
    return out


def fixed_assignment(patients, train, val, test) -> dict[str, str]:
    """Patients of fixed lists; patients in none get '' (excluded, reason not_in_split_lists)."""
    where = {**{p: "test" for p in test}, **{p: "val" for p in val}, **{p: "train" for p in train}}
    return {p: where.get(p, "") for p in patients}
