"""``run``: read sources, process every record, and write one dataset folder."""
from __future__ import annotations

import logging
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
from .pipeline import RecordResult, _empty_beats, normalize_results, safe_process
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
    found, problems = find_sources(list(sources))
    if not found:
        raise ConfigError(problems or ["no input records given"])
    for p in problems:
        log.warning("%s", p)
    _prepare_out(out, overwrite)

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
        res = safe_process(lambda s=src: read_source(s, cfg.read), src.name, cfg, axis)
        if res.status == "failed":
            log.warning("%s: %s", src.name, res.error)
        results.append(res)
        if progress:
            progress(res, i + 1, len(found))
    return _write(out, results, cfg, axis, [str(s) for s in sources], found)


def _prepare_out(out: Path, overwrite: bool) -> None:
    if out.exists() and not out.is_dir():
        raise ConfigError(f"output {out} exists and is not a folder; choose another --out")
    if out.exists() and any(out.iterdir()):
        if not overwrite:
            raise ConfigError(f"output folder {out} is not empty; choose a new --out or pass "
                              "--overwrite to replace it")
        if not (out / MANIFEST).exists():
            raise ConfigError(f"refusing to replace {out}: it holds files but no {MANIFEST}, so "
                              "it is not a beatmill dataset; remove it yourself if you mean it")
        shutil.rmtree(out)
    out.mkdir(parents=True, exist_ok=True)


def _write(out: Path, results: list[RecordResult], cfg: Config, axis: list[str],
           given: list[str], found: list[Source]) -> RunSummary:
    n_ax, n_s = len(axis), cfg.resample.n_samples
    for r in results:  # failed records contribute empty arrays of the right shape
        if r.tensor is None:
            r.tensor = np.zeros((0, n_ax, n_s))
            r.mask = np.zeros((0, n_ax), bool)
            r.beats = _empty_beats()
    normed = normalize_results(results, cfg)
    offset = 0
    frames = []
    for r in results:
        b = r.beats.copy()
        b["tensor_index"] = np.where(b["tensor_index"] >= 0, b["tensor_index"] + offset, -1)
        frames.append(b)
        offset += r.n_kept
    beats = pd.concat(frames, ignore_index=True) if frames else _empty_beats()
    if beats.empty:
        beats = _empty_beats()
    tensor = np.concatenate([n[0] for n in normed]).astype(np.float32) if normed else \
        np.zeros((0, n_ax, n_s), np.float32)
    mask = np.concatenate([r.mask for r in results]).astype(bool)
    center = np.concatenate([n[1] for n in normed]).astype(np.float32)
    scale = np.concatenate([n[2] for n in normed]).astype(np.float32)
    write_npy(out / "beats.npy", tensor)
    write_npy(out / "lead_mask.npy", mask)
    write_npy(out / "norm_center.npy", center)
    write_npy(out / "norm_scale.npy", scale)
    write_parquet(out / "beats.parquet", beats)
    lead_rows = [row for r in results for row in r.leads]
    leads = pd.DataFrame(lead_rows) if lead_rows else pd.DataFrame(
        {c: [] for c in ("record", "lead", "source_name", "used", "reason", "in_axis")})
    write_parquet(out / "leads.parquet", leads)
    records = pd.DataFrame({
        "record": [r.name for r in results], "status": [r.status for r in results],
        "error": [r.error for r in results], "fs": [float(r.fs) for r in results],
        "duration_s": [float(r.duration_s) for r in results],
        "n_leads": [int(r.n_leads) for r in results], "n_beats": [r.n_beats for r in results],
        "n_kept": [r.n_kept for r in results],
        "inputs": [[{"file": f, "sha256": h} for f, h in r.inputs] for r in results]})
    write_parquet(out / "records.parquet", records)

    n_failed = sum(r.status == "failed" for r in results)
    n_nolead = sum(r.status == "no_usable_lead" for r in results)
    reason_counts: dict[str, int] = {}
    for cell in beats["reasons"]:
        for c in filter(None, str(cell).split(";")):
            reason_counts[c] = reason_counts.get(c, 0) + 1
    manifest = {
        "tool": {"name": "beatmill", "version": __version__},
        "config_sha256": cfg.sha256(),
        "config": cfg.to_dict(),
        "environment": environment(),
        "lead_axis": axis,
        "tensor": {"file": "beats.npy", "shape": list(tensor.shape), "dtype": "float32",
                   "order": "C", "axes": ["beat", "lead", "sample"],
                   "normalization": {"method": cfg.normalize.method, "scope": cfg.normalize.scope,
                                     "invert": "beat_mv = beats * norm_scale[..., None] + "
                                               "norm_center[..., None]"}},
        "inputs": {"given": given, "records": [str(s.path) for s in found]},
        "counts": {"records": len(results), "records_ok": len(results) - n_failed - n_nolead,
                   "records_failed": n_failed, "records_no_usable_lead": n_nolead,
                   "beats": int(len(beats)), "beats_kept": int(tensor.shape[0]),
                   "beats_excluded": int(len(beats) - tensor.shape[0]),
                   "excluded_by_reason": dict(sorted(reason_counts.items()))},
        "records": {r.name: {"status": r.status, "error": r.error,
                             "stages": [lg.to_dict() for lg in r.logs]} for r in results},
        "files": {f: sha256_path(out / f) for f in TENSOR_FILES + TABLE_FILES},
    }
    write_manifest(out / MANIFEST, manifest)
    usable = len(results) - n_failed - n_nolead
    code = (EXIT_NONE_USABLE if usable == 0 else EXIT_SOME_FAILED if usable < len(results)
            else EXIT_OK)
    return RunSummary(out, len(results), n_failed, n_nolead, int(len(beats)),
                      int(tensor.shape[0]), axis, code)
