"""``run``: read sources, process every record, and write one dataset folder."""
from __future__ import annotations

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
from .errors import BeatmillError, ConfigError
from .export import (MANIFEST, TABLE_FILES, TENSOR_FILES, environment, sha256_path, write_manifest,
                     write_npy, write_parquet)
from .leads import default_axis, resolve_axis
from . import reasons as reasons_mod
from .labels import AAMI_CLASSES, UNLABELED, load_mapping
from .normalize import apply_stats, fit_per_lead, normalize
from .pipeline import BEAT_COLUMNS, RecordResult, _empty_beats, safe_process
from .split import SPLITS, assign_patients, fixed_assignment, load_patient_map, patient_of
from .read import Source, find_sources, read_source

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
            names = h.sig_name or []
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
        progress: Callable[[RecordResult, int, int], None] | None = None) -> RunSummary:
    """Process records and write the dataset folder ``out`` (what ``beatmill run`` does).

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
    _prepare_out(out, overwrite, cfg.sha256(extra))

    if cfg.leads.select:
        axis = resolve_axis(cfg.leads.select)
    else:
        peeks = [lp for lp in (_peek_leads(s, cfg) for s in found) if lp]
        axis = default_axis(peeks)
        if not axis:
            raise ConfigError("the records share no ECG lead; choose the lead axis with --leads "
                              "(for example --leads II)")
    results: list[RecordResult] = []
    for i, src in enumerate(found):
        res = safe_process(lambda s=src: read_source(s, cfg.read), src.name, cfg, axis, mapping)
        if res.status == "failed":
            log.warning("%s: %s", src.name, res.error)
        results.append(res)
        if progress:
            progress(res, i + 1, len(found))
    a = assemble(results, cfg, axis, [str(s) for s in sources], [str(s.path) for s in found],
                 mapping, pmap, extra)
    _write_in_place(out, a)
    return _summary(out, a)


def _write_in_place(out: Path, a: Assembled) -> None:
    """Write into a staging folder beside ``out``, then swap it in; on any error (no space, no
    permission) the staging folder is removed and ``out`` is left as it was."""
    out.parent.mkdir(parents=True, exist_ok=True)
    stage = out.parent / f".{out.name}.partial-{os.getpid()}"
    old = out.parent / f".{out.name}.old-{os.getpid()}"
    shutil.rmtree(stage, ignore_errors=True)
    try:
        stage.mkdir()
        write_assembled(stage, a)
        if out.exists():
            out.rename(old)
        stage.rename(out)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        if old.exists() and not out.exists():
            old.rename(out)
        raise
    shutil.rmtree(old, ignore_errors=True)


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
            return
        if not overwrite:
            if previous:
                raise ConfigError(f"output folder {out} holds a dataset made with another "
                                  f"configuration (hash {previous[:12]}, this run {config_hash[:12]}); "
                                  "choose a new --out or pass --overwrite to replace it")
            raise ConfigError(f"output folder {out} is not empty; choose a new --out or pass "
                              "--overwrite to replace it")
        if not (out / MANIFEST).exists():
            raise ConfigError(f"refusing to replace {out}: it holds files but no {MANIFEST}, so "
                              "it is not a beatmill dataset; remove it yourself if you mean it")
    if not os.access(out if out.exists() else _existing_parent(out), os.W_OK):
        raise ConfigError(f"cannot write to {out}: permission denied; choose another --out")


def _previous_hash(out: Path) -> str | None:
    try:
        return json.loads((out / MANIFEST).read_text(encoding="utf-8")).get("config_sha256")
    except (OSError, ValueError, AttributeError):
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
             record_paths: list[str], mapping: dict, pmap: dict, extra: dict) -> Assembled:
    """Split, order, normalize and tabulate processed records into one dataset (no I/O)."""
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
        b = r.beats.copy()
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
    if "patient" not in beats:
        beats["patient"], beats["split"], beats["_rec"], beats["_local"] = "", "", 0, -1

    # ---- global order: split, then patient, then record and time -----------------------
    rank = {"train": 0, "val": 1, "test": 2}
    kept = beats[beats["included"]].copy()
    kept["_rank"] = kept["split"].map(rank).fillna(3)
    kept = kept.sort_values(["_rank", "patient", "record", "r_sample"], kind="stable")
    beats["tensor_index"] = -1
    beats.loc[kept.index, "tensor_index"] = np.arange(len(kept))
    raw = (np.concatenate([results[k].tensor[li] [None] for k, li in
                           zip(kept["_rec"], kept["_local"])]) if len(kept) else
           np.zeros((0, n_ax, n_s)))
    mask = (np.concatenate([results[k].mask[li][None] for k, li in
                            zip(kept["_rec"], kept["_local"])]) if len(kept) else
            np.zeros((0, n_ax), bool))
    tensor, center, scale, norm_note = _normalize_all(raw, mask, kept, cfg)
    ranges = {}
    for sname in SPLITS:
        idx = np.flatnonzero(kept["split"].to_numpy() == sname)
        ranges[sname] = [int(idx[0]), int(idx[-1]) + 1] if idx.size else [0, 0]
    beats = beats.drop(columns=["_rec", "_local"])
    cols = [c for c in BEAT_COLUMNS if c in beats] + ["patient", "split"]
    beats = beats[cols]
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
    return Assembled(tensor.astype(np.float32), mask.astype(bool), center.astype(np.float32),
                     scale.astype(np.float32), beats, leads, records, windows, manifest, code)


def write_assembled(out: Path, a: Assembled) -> None:
    """Write an assembled dataset; the manifest, holding every file's SHA-256, comes last."""
    write_npy(out / "beats.npy", a.beats)
    write_npy(out / "lead_mask.npy", a.lead_mask)
    write_npy(out / "norm_center.npy", a.norm_center)
    write_npy(out / "norm_scale.npy", a.norm_scale)
    write_parquet(out / "beats.parquet", a.table)
    write_parquet(out / "leads.parquet", a.leads)
    write_parquet(out / "records.parquet", a.records)
    write_parquet(out / "windows.parquet", a.windows)
    manifest = {**a.manifest,
                "files": {f: sha256_path(out / f) for f in TENSOR_FILES + TABLE_FILES}}
    write_manifest(out / MANIFEST, manifest)


def _summary(out: Path, a: Assembled) -> RunSummary:
    c = a.manifest["counts"]
    return RunSummary(out, c["records"], c["records_failed"], c["records_no_usable_lead"],
                      c["beats"], c["beats_kept"], a.manifest["lead_axis"], a.exit_code,
                      a.manifest["splits"])


def _normalize_all(raw: np.ndarray, mask: np.ndarray, kept: pd.DataFrame, cfg: Config):
    """Normalize the ordered kept beats; dataset statistics come from the training split."""
    m, scope = cfg.normalize.method, cfg.normalize.scope
    if scope == "beat" or len(kept) == 0:
        y, c, s = normalize(raw, mask, m, "beat")
        return y, c, s, "each beat and lead"
    if scope == "record":
        c = np.zeros(mask.shape)
        s = np.ones(mask.shape)
        recs = kept["record"].to_numpy()
        for name in pd.unique(recs):
            sel = recs == name
            cr, sr = fit_per_lead(raw[sel], mask[sel], m)
            c[sel], s[sel] = cr, sr
        y, c, s = apply_stats(raw, mask, c, s)
        return y, c, s, "each record and lead"
    train = kept["split"].to_numpy() == "train"
    note = "the training split, per lead"
    if not train.any():
        train = np.ones(len(kept), bool)
        note = "all kept beats, per lead (the training split is empty)"
    c1, s1 = fit_per_lead(raw[train], mask[train], m)
    y, c, s = apply_stats(raw, mask, c1[None, :], s1[None, :])
    return y, c, s, note


def split_summary(info: dict) -> str:
    """The end-of-run table: beats per split and class, patients per split."""
    classes = sorted({c for v in info.values() for c in v["classes"]})
    head = f"{'split':<6}{'patients':>9}{'beats':>8}" + "".join(f"{c:>11}" for c in classes)
    lines = [head]
    for sname, v in info.items():
        lines.append(f"{sname:<6}{len(v['patients']):>9}{v['beats']:>8}" +
                     "".join(f"{v['classes'].get(c, 0):>11}" for c in classes))
    return "\n".join(lines)
