"""The Python door: process arrays in memory, and open a finished dataset read-only."""
from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from prep.config import Config
from prep.dataset.folder import finish_swap
from prep.errors import BeatmillError
from prep.model import Annotations
from prep.quality.reasons import FLAGS, REASONS, group
from prep.schema import (BEATS_NPY, LEAD_MASK_NPY, MANIFEST, NORM_CENTER_NPY, NORM_SCALE_NPY,
                         WINDOWS_TABLE)

if TYPE_CHECKING:
    from prep.dataset.assemble import Assembled

#: columns of datasets written before 0.1's renames, read under their present names
_OLD_COLUMNS = {"class": "beat_class", "flags": "beat_flags"}

# reason -> (score column, config section, config key) for explanations
_EVIDENCE = {
    "high_freq_noise": ("hf_ratio", "quality", "max_hf_ratio"),
    "flat_or_clipped": ("bad_fraction", "quality", "max_bad_fraction_in_beat"),
    "unlike_neighbours": ("template_corr", "quality", "exclude_template_corr"),
    "one_lead_only": ("n_leads_seen", "rpeaks", "min_lead_template_corr"),
    "unmatched_in_noise": ("qrs_match", "quality", "noise_min_qrs_match"),
    "amplitude_outlier": ("amplitude_z", "quality", "max_amplitude_z"),
    "rr_too_short": ("rr_prev_s", "quality", "min_rr_s"),
}


def process(signals, fs: float, *, leads: list[str] | None = None, config: Config | None = None,
            name: str = "memory", annotations: Annotations | None = None) -> "Assembled":
    """Run the whole pipeline on in-memory arrays; nothing touches the disk.

    Parameters
    ----------
    signals : array, shape (n_leads, n_samples)
        ECG in mV (NaN marks missing samples).
    fs : float
        Sampling rate in Hz.
    leads : list of str, optional
        Lead names (default ECG1, ECG2...). The lead axis is ``config.leads.select`` or these.
    annotations : Annotations, optional
        Reference annotations, for labels.

    Returns
    -------
    Assembled
        ``.beats`` (float32 tensor), ``.lead_mask``, ``.norm_center``, ``.norm_scale``,
        ``.table`` (the beats.parquet rows), ``.leads``, ``.records``, ``.manifest``.

    Examples
    --------
    >>> from prep.demo import SPECS, synthesize
    >>> d, names, r, sym, _ = synthesize(SPECS[0])
    >>> out = process(d / 1000.0, 250.0, leads=names)
    >>> out.beats.shape[1:], int(out.table.included.sum()) == out.beats.shape[0]
    ((2, 256), True)
    """
    # the signal stack loads here, not with the module: open_dataset, why and check stay light
    from prep.dataset.assemble import Provenance, assemble
    from prep.dataset.run import resolve_extras
    from prep.io._files import check_rate
    from prep.leads import canonical_lead, default_axis, resolve_axis
    from prep.model import Record
    from prep.pipeline.record import record_result
    cfg = (config or Config()).validate()
    x = np.asarray(signals, dtype=np.float64)
    if x.ndim == 1:
        x = x[None]
    if x.ndim != 2:
        raise BeatmillError(f"process: signals must have shape (n_leads, n_samples); got {x.shape}")
    names = list(leads) if leads else [f"ECG{i + 1}" for i in range(x.shape[0])]
    if len(names) != x.shape[0]:
        raise BeatmillError(f"process: {len(names)} lead names for {x.shape[0]} leads")
    canon = [canonical_lead(n) for n in names]
    if not np.isfinite(fs) or fs <= 0:
        raise BeatmillError(f"process: fs must be a positive rate in Hz; got {fs!r}")
    rec = Record(name=name, fs=float(fs), signals=x, lead_names=names, leads=canon,
                 units=["mV"] * len(names), annotations=annotations, path=f"<{name}>",
                 channels=list(range(len(names))))
    axis = resolve_axis(cfg.leads.select) if cfg.leads.select else default_axis([canon])
    mapping, pmap, extra = resolve_extras(cfg)
    def load() -> Record:
        check_rate(float(fs), f"<{name}>")
        return rec
    res = record_result(load, name, cfg, axis, mapping)
    return assemble([res], cfg, axis, Provenance([f"<{name}>"], [f"<{name}>"], mapping, pmap,
                                                  extra))


class Dataset:
    """Read-only view of a finished run folder (see :func:`open_dataset`)."""

    def __init__(self, run_dir: str | Path):
        self.path = Path(run_dir)
        if self.path.is_dir():
            finish_swap(self.path)  # a run killed while moving the dataset in: complete it
        mpath = self.path / MANIFEST
        if not mpath.exists():
            raise BeatmillError(f"{self.path} is not a beatmill dataset (no manifest.json); write "
                                "one with 'beatmill run ... --out DIR'")
        self.manifest: dict = json.loads(mpath.read_text(encoding="utf-8"))
        self.beats = np.load(self.path / BEATS_NPY, mmap_mode="r")
        self.lead_mask = np.load(self.path / LEAD_MASK_NPY, mmap_mode="r")
        self.norm_center = np.load(self.path / NORM_CENTER_NPY, mmap_mode="r")
        self.norm_scale = np.load(self.path / NORM_SCALE_NPY, mmap_mode="r")
        self._tables: dict[str, pd.DataFrame] = {}

    def _table(self, name: str) -> pd.DataFrame:
        if name not in self._tables:
            t = pd.read_parquet(self.path / f"{name}.parquet")
            self._tables[name] = t.rename(columns=_OLD_COLUMNS) if name == "beats" else t
        return self._tables[name]

    @property
    def table(self) -> pd.DataFrame:
        """beats.parquet: one row per detected beat."""
        return self._table("beats")

    @property
    def leads(self) -> pd.DataFrame:
        return self._table("leads")

    @property
    def records(self) -> pd.DataFrame:
        return self._table("records")

    @property
    def windows(self) -> pd.DataFrame | None:
        """windows.parquet (one row per record, lead and quality window); None when absent."""
        return self._table("windows") if (self.path / WINDOWS_TABLE).exists() else None

    @property
    def lead_axis(self) -> list[str]:
        return list(self.manifest["lead_axis"])

    @property
    def class_names(self) -> list[str]:
        """Class order used for label indices: N, S, V, F, Q, custom classes, unlabeled."""
        lab = self.manifest.get("labels", {})
        found = set(lab.get("classes", {}).values())
        base = [c for c in ("N", "S", "V", "F", "Q")]
        return base + sorted(found - set(base)) + [lab.get("unlabeled", "unlabeled")]

    def split(self, name: str) -> tuple[np.ndarray, pd.DataFrame]:
        """The contiguous tensor slice of a split (a memory-mapped view) and its kept rows."""
        info = self.manifest.get("splits", {})
        if name not in info:
            raise BeatmillError(f"split must be one of {', '.join(info)}; got {name!r}")
        a, b = info[name]["rows"]
        t = self.table
        rows = t[t["included"] & (t["tensor_index"] >= a) & (t["tensor_index"] < b)]
        return self.beats[a:b], rows.sort_values("tensor_index").reset_index(drop=True)

    def _nearest(self, beat_id: str) -> str:
        """The beats of that record nearest the sample asked for, or the records there are."""
        t = self.table
        record, _, sample = beat_id.rpartition(":")
        rows = t[t["record"] == record]
        if rows.empty:
            names = sorted(t["record"].unique())
            return ("records here: " + ", ".join(names[:8]) + (" ..." if len(names) > 8 else "")
                    if names else "the dataset holds no beat")
        try:
            at = int(sample)
        except ValueError:
            at = 0
        near = rows.iloc[np.argsort(np.abs(rows["r_sample"].to_numpy() - at))[:3]]
        return "nearest beats of " + record + ": " + ", ".join(sorted(near["beat_id"],
                                                                      key=lambda b: int(b.rpartition(":")[2])))

    def explain(self, beat_id: str) -> dict:
        """What happened to one beat, as data: where, label, kept or not, and why."""
        t = self.table
        hit = t[t["beat_id"] == beat_id]
        if hit.empty:
            raise BeatmillError(f"no beat {beat_id!r} in {self.path}; {self._nearest(beat_id)}")
        row = hit.iloc[0]
        cfg = self.manifest["config"]
        reasons = []
        for code in filter(None, str(row["reasons"]).split(";")):
            stage, text = REASONS.get(code, ("?", "unknown code"))
            item = {"code": code, "stage": stage, "group": group(code), "explanation": text}
            if code in _EVIDENCE:
                col, sec, key = _EVIDENCE[code]
                item.update(score_name=col, score=_num(row[col]), threshold_name=f"{sec}.{key}",
                            threshold=cfg[sec][key])
            reasons.append(item)
        flags = [{"code": f, "explanation": FLAGS.get(f, "")}
                 for f in filter(None, str(row["beat_flags"]).split(";"))]
        rec_leads = self.leads[self.leads["record"] == row["record"]]
        windows = []
        wpath = self.path / WINDOWS_TABLE
        if wpath.exists():
            w = self._table("windows")
            w = w[(w["record"] == row["record"]) & (w["start"] <= row["r_sample"]) &
                  (w["end"] > row["r_sample"])]
            fs = float(self.records.set_index("record").loc[row["record"], "fs"])
            windows = [{"lead": x.lead, "grade": x.grade, "decided_by": x.decided_by,
                        "rhythm_findings": getattr(x, "rhythm_findings", ""),
                        "start_s": round(x.start / fs, 3), "end_s": round(x.end / fs, 3)}
                       for x in w.itertuples()]
        return {"beat_id": beat_id, "record": row["record"], "patient": row.get("patient", ""),
                "split": row.get("split", ""), "r_sample": int(row["r_sample"]),
                "r_time_s": float(row["r_time_s"]), "label": row["label"],
                "beat_class": row.get("beat_class", ""), "included": bool(row["included"]),
                "tensor_index": int(row["tensor_index"]),
                "is_beat": bool(row["is_beat"]) if "is_beat" in row else True,
                "reasons": reasons, "beat_flags": flags,
                "scores": {c: _num(row[c]) for c in ("detect_conf", "n_leads_seen",
                                                     "template_corr", "hf_ratio", "bad_fraction")},
                "leads_used": rec_leads[rec_leads["used"]]["lead"].tolist(),
                "windows": windows}

    def source_of(self, record: str) -> str:
        """Path of the input a record was read from (as recorded in the manifest)."""
        names = self.records["record"].tolist()
        if record not in names:
            raise BeatmillError(f"no record {record!r} in {self.path}")
        return self.manifest["inputs"]["records"][names.index(record)]


def _num(v):
    v = float(v)
    return None if not np.isfinite(v) else v


def open_dataset(run_dir: str | Path) -> Dataset:
    """Open a finished run folder read-only (tensors memory-mapped, tables loaded on use).

    >>> import tempfile, prep
    >>> d = prep.open_dataset(prep.run(["demo_records/night01.hea"], tempfile.mkdtemp() + "/r").out)
    >>> view, rows = d.split("test")
    >>> view.shape[0] == len(rows)
    True
    """
    return Dataset(run_dir)
