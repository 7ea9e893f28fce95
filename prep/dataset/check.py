"""Verify a finished dataset folder: files match the manifest, tensors and tables agree."""
from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

from prep.dataset.folder import finish_swap
from prep.errors import BeatmillError
from prep.io._files import sha256_file
from prep.schema import (BEAT_COLUMNS, BEATS_NPY, BEATS_TABLE, LEAD_MASK_NPY, MANIFEST,
                         NORM_CENTER_NPY, NORM_SCALE_NPY, RECORDS_TABLE, TABLE_FILES, TENSOR_FILES)


def check_dataset(run_dir: str | Path) -> list[str]:
    """Every problem found in ``run_dir`` (empty list when the dataset is sound)."""
    import pandas as pd

    d = Path(run_dir)
    try:
        finish_swap(d)  # a run killed while moving the dataset in: complete it first
    except BeatmillError as exc:
        return [str(exc)]
    mpath = d / MANIFEST
    if not mpath.exists():
        return [f"{mpath}: missing; is {d} a beatmill dataset folder?"]
    try:
        manifest = json.loads(mpath.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        return [f"{mpath}: not valid JSON ({exc})"]
    except PermissionError:
        return [f"{mpath}: cannot be read (permission denied); ask the dataset's owner for read "
                "access (files written before beatmill 0.1 may be private to their writer)"]
    problems = _check_files(d, manifest)
    if problems:
        return problems
    try:
        beats = np.load(d / BEATS_NPY, mmap_mode="r")
        mask = np.load(d / LEAD_MASK_NPY, mmap_mode="r")
        center = np.load(d / NORM_CENTER_NPY, mmap_mode="r")
        scale = np.load(d / NORM_SCALE_NPY, mmap_mode="r")
        table = pd.read_parquet(d / BEATS_TABLE)
        records = pd.read_parquet(d / RECORDS_TABLE)
    except Exception as exc:
        return [f"{d}: cannot load the dataset files ({type(exc).__name__}: {exc})"]
    n = beats.shape[0] if beats.ndim == 3 else -1
    problems += _check_arrays(manifest, beats, mask, center, scale)
    missing = [c for c in BEAT_COLUMNS if c not in table.columns]
    if missing:  # the checks below read these columns
        return problems + [f"beats.parquet: missing columns {missing}"]
    problems += _check_beat_table(table, records, n)
    problems += _check_splits_and_labels(table, records, manifest, n)
    if n > 0 and not np.isfinite(np.asarray(beats[: min(n, 100000)])).all():
        problems.append("beats.npy: holds non-finite values")
    return problems


def _check_files(d: Path, manifest: dict) -> list[str]:
    """Every dataset file present, readable, listed in the manifest, with its SHA-256."""
    problems: list[str] = []
    files = manifest.get("files", {})
    for f in TENSOR_FILES + TABLE_FILES:
        p = d / f
        if not p.exists():
            problems.append(f"{p}: missing")
        elif f not in files:
            problems.append(f"{p}: not listed in the manifest")
        elif not os.access(p, os.R_OK):
            problems.append(f"{p}: cannot be read (permission denied); ask the dataset's owner "
                            "for read access")
        elif sha256_file(p) != files[f]:
            problems.append(f"{p}: SHA-256 differs from the manifest (file changed or corrupted)")
    return problems


def _check_arrays(manifest: dict, beats, mask, center, scale) -> list[str]:
    """Tensor dtype, order and shape against the manifest and the lead axis."""
    problems: list[str] = []
    axis = manifest.get("lead_axis", [])
    n = beats.shape[0] if beats.ndim == 3 else -1
    if beats.ndim != 3 or beats.dtype != np.float32 or not beats.flags.c_contiguous:
        problems.append(f"beats.npy: expected C-order float32 of 3 dimensions, got {beats.dtype} "
                        f"shape {beats.shape}")
    if list(beats.shape) != manifest.get("tensor", {}).get("shape"):
        problems.append(f"beats.npy: shape {list(beats.shape)} differs from the manifest's "
                        f"{manifest.get('tensor', {}).get('shape')}")
    if beats.ndim == 3 and beats.shape[1] != len(axis):
        problems.append(f"beats.npy: {beats.shape[1]} leads but the lead axis names {len(axis)}")
    for name, arr, dt in ((LEAD_MASK_NPY, mask, np.bool_), (NORM_CENTER_NPY, center, np.float32),
                          (NORM_SCALE_NPY, scale, np.float32)):
        if arr.shape != (n, len(axis)) or arr.dtype != dt:
            problems.append(f"{name}: expected shape ({n}, {len(axis)}) {np.dtype(dt)}, got "
                            f"{arr.shape} {arr.dtype}")
    return problems


def _check_beat_table(table, records, n: int) -> list[str]:
    """Beat rows against the tensor: included rows are its rows, excluded ones say why."""
    problems: list[str] = []
    inc = table["included"].to_numpy(bool)
    ti = table["tensor_index"].to_numpy()
    if int(inc.sum()) != n:
        problems.append(f"beats.parquet: {int(inc.sum())} included rows but beats.npy has {n} beats")
    if not np.array_equal(np.sort(ti[inc]), np.arange(inc.sum())):
        problems.append("beats.parquet: tensor_index of included rows is not 0..n-1, each once")
    if (ti[~inc] != -1).any():
        problems.append("beats.parquet: excluded rows must have tensor_index -1")
    reasons = table["reasons"].fillna("").astype(str)
    if (reasons[inc] != "").any():
        problems.append("beats.parquet: included rows must have no reasons")
    if (reasons[~inc] == "").any():
        problems.append("beats.parquet: every excluded row needs at least one reason")
    if table["beat_id"].duplicated().any():
        problems.append("beats.parquet: beat_id is not unique")
    ids = table["record"].astype(str) + ":" + table["r_sample"].astype(str)
    if not (ids == table["beat_id"]).all():
        problems.append("beats.parquet: beat_id must be record:r_sample")
    if int(records["n_kept"].sum()) != n:
        problems.append(f"records.parquet: n_kept adds up to {int(records['n_kept'].sum())}, "
                        f"beats.npy has {n}")
    if not set(table["record"]).issubset(set(records["record"])):
        problems.append("beats.parquet: names records that records.parquet does not list")
    return problems


def _check_splits_and_labels(table, records, manifest: dict, n: int) -> list[str]:
    """No patient in two splits; split row ranges match the tensor; labels and classes valid."""
    from prep.dataset.split import SPLITS
    from prep.stages.labels import beat_classes

    out: list[str] = []
    for name, t in ((BEATS_TABLE, table), (RECORDS_TABLE, records)):
        if "patient" not in t or "split" not in t:
            out.append(f"{name}: missing patient/split columns")
            return out
        sub = t[t["split"] != ""]
        per = sub.groupby("patient")["split"].nunique()
        leak = sorted(per[per > 1].index)
        if leak:
            out.append(f"{name}: patients in more than one split: {leak[:10]}")
        bad = sorted(set(sub["split"]) - set(SPLITS))
        if bad:
            out.append(f"{name}: unknown split names {bad}")
    ranges = {k: v.get("rows") for k, v in manifest.get("splits", {}).items()}
    kept = table[table["included"]].sort_values("tensor_index")
    splits = kept["split"].to_numpy()
    for sname in SPLITS:
        a, b = ranges.get(sname) or [0, 0]
        idx = np.flatnonzero(splits == sname)
        want = [int(idx[0]), int(idx[-1]) + 1] if idx.size else [0, 0]
        if [a, b] != want or (idx.size and idx.size != b - a):
            out.append(f"manifest.json: split '{sname}' rows {[a, b]} do not match the tensor "
                       f"rows of that split {want}")
    if n and sum((v or [0, 0])[1] - (v or [0, 0])[0] for v in ranges.values()) != n:
        out.append("manifest.json: split row ranges do not cover every tensor row")
    table_classes = manifest.get("labels", {}).get("classes")
    if table_classes is not None and "beat_class" in table:
        want = beat_classes(table["label"].fillna("").astype(str).to_numpy(), table_classes)
        if not (want == table["beat_class"].to_numpy()).all():
            out.append("beats.parquet: class does not follow label through the manifest's table")
        tc = set(manifest.get("labels", {}).get("train_classes", []))
        if tc:
            tr = table[table["included"] & (table["split"] == "train")]
            off = sorted(set(tr["beat_class"]) - tc)
            if off:
                out.append(f"beats.parquet: training split holds classes {off} outside "
                           f"train_classes {sorted(tc)}")
    return out
