"""The orchestrator: chains the stages on one record, then assembles and writes the dataset.

Stages are pure functions; this module only moves arrays between them, turns NaN stretches into
gaps before any stage runs, collects each stage's :class:`StageLog`, and catches a record's
failure so that the batch goes on.
"""
from __future__ import annotations

import logging
import traceback
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd

from . import reasons as R
from .bandpass import bandpass
from .baseline import remove_baseline
from .config import Config
from .errors import BeatmillError, RecordError
from .labels import attach_labels, beat_classes, noise_stretches, rhythm_at
from .leads import match_lead
from .model import Record, StageLog
from .read import BEAT_SYMBOLS
from .powerline import remove_powerline
from .quality import hf_ratio, high_freq, lead_faults, template_corr, window_fraction
from .resample import cut_and_resample
from .rpeaks import detect_beats
from .segment import beat_windows

log = logging.getLogger("prep")

BEAT_COLUMNS = ["beat_id", "record", "r_sample", "r_time_s", "rr_prev_s", "rr_next_s", "included",
                "reasons", "tensor_index", "flags", "label", "class", "rhythm", "detect_conf", "n_leads_seen",
                "template_corr", "hf_ratio", "bad_fraction"]


@dataclass
class RecordResult:
    """Everything one record contributes to a dataset (beats not yet normalized)."""

    name: str
    status: str                      # ok / failed / no_usable_lead
    error: str = ""
    fs: float = float("nan")
    duration_s: float = float("nan")
    n_leads: int = 0
    inputs: list = field(default_factory=list)
    beats: pd.DataFrame | None = None          # one row per detected beat
    tensor: np.ndarray | None = None           # (n_kept, n_axis, n_samples), mV, time order
    mask: np.ndarray | None = None             # (n_kept, n_axis) bool
    leads: list[dict] = field(default_factory=list)
    logs: list[StageLog] = field(default_factory=list)
    comments: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    @property
    def n_beats(self) -> int:
        return 0 if self.beats is None else len(self.beats)

    @property
    def n_kept(self) -> int:
        return 0 if self.tensor is None else int(self.tensor.shape[0])


def fill_gaps(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Replace NaN/inf runs by linear interpolation per lead; returns (filled, gap mask)."""
    gap = ~np.isfinite(x)
    if not gap.any():
        return x, gap
    y = x.copy()
    idx = np.arange(x.shape[1])
    for j in np.flatnonzero(gap.any(axis=1)):
        ok = ~gap[j]
        y[j] = np.interp(idx, idx[ok], x[j, ok]) if ok.any() else 0.0
    return y, gap


def _empty_beats() -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=t) for c, t in zip(
        BEAT_COLUMNS, ["str", "str", "int64", "float64", "float64", "float64", "bool", "str",
                       "int64", "str", "str", "str", "str", "float64", "int64", "float64",
                       "float64", "float64"])})


def process_record(rec: Record, cfg: Config, axis: list[str],
                   mapping: dict[str, str] | None = None) -> RecordResult:
    """Run every stage on one record. Raises :class:`RecordError` for record-level failures.

    ``mapping``: symbol -> class overrides (see :func:`prep.labels.load_mapping`).
    """
    fs = rec.fs
    n_ax = len(axis)
    res = RecordResult(rec.name, "ok", fs=fs, duration_s=rec.duration_s, n_leads=len(rec.leads),
                       inputs=rec.inputs, comments=list(rec.comments),
                       warnings=list(rec.warnings))
    min_len = int(round((cfg.segment.before_ms + cfg.segment.after_ms) * fs / 1000))
    if rec.n_samples < max(min_len, int(2 * fs)):
        raise RecordError(f"record is {rec.duration_s:.3g} s long; at least "
                          f"{max(min_len / fs, 2.0):.3g} s are needed for one beat window",
                          path=rec.path, stage="segment")
    raw, gap = fill_gaps(rec.signals)
    res.logs.append(StageLog("gaps", counts={"missing_samples": int(gap.sum())}))

    # lead faults on the raw signal, before any filter smears them
    bad, fault = lead_faults(raw, fs, cfg.quality, gap)
    usable = np.array([f["usable_fraction"] >= cfg.quality.min_usable_fraction for f in fault])
    lead_reason = ["" if u else _fault_reason(f) for u, f in zip(usable, fault)]

    y, lg = remove_powerline(raw, fs, cfg.powerline)
    res.logs.append(lg)
    notched = y
    y, lg = bandpass(y, fs, cfg.bandpass)
    res.logs.append(lg)
    y, lg = remove_baseline(y, fs, cfg.baseline)
    res.logs.append(lg)

    res.logs.append(StageLog("lead_faults", params={"flat_ms": cfg.quality.flat_ms,
                                                    "clip_run_samples": cfg.quality.clip_run_samples,
                                                    "min_usable_fraction":
                                                        cfg.quality.min_usable_fraction},
                             derived={rec.leads[j]: {**fault[j], "rejected": lead_reason[j]}
                                      for j in range(len(rec.leads))}))
    fused, lg = detect_beats(y, fs, usable, cfg.rpeaks, names=rec.leads)
    res.logs.append(lg)
    for j in np.flatnonzero(usable):
        if fused.support[:, j].sum() == 0:
            usable[j] = False
            lead_reason[j] = "no beats found in this lead"
    res.leads = [{"record": rec.name, "lead": rec.leads[j], "source_name": rec.lead_names[j],
                  "used": bool(usable[j]), "reason": lead_reason[j],
                  "in_axis": match_lead(rec.leads[j], axis) is not None, **fault[j]}
                 for j in range(len(rec.leads))]
    for name, why in rec.skipped:
        res.leads.append({"record": rec.name, "lead": name, "source_name": name, "used": False,
                          "reason": why, "in_axis": False, "flat_fraction": float("nan"),
                          "clipped_fraction": float("nan"), "missing_fraction": float("nan"),
                          "usable_fraction": float("nan")})
    if not usable.any():
        res.status = "no_usable_lead"
        res.error = "no usable ECG lead: " + "; ".join(
            f"{rec.leads[j]}: {lead_reason[j]}" for j in range(len(rec.leads)))
        res.beats = _empty_beats()
        res.tensor = np.zeros((0, n_ax, cfg.resample.n_samples))
        res.mask = np.zeros((0, n_ax), bool)
        return res

    # axis mapping: which record lead fills each axis slot (None = missing)
    slot = [match_lead(a, rec.leads) for a in axis]
    slot_ok = np.array([s is not None and usable[s] for s in slot], bool)
    rows_src = [s if s is not None else 0 for s in slot]

    r = fused.r
    n = r.size
    reasons: list[list[str]] = [[] if a else ["one_lead_only"] for a in fused.accepted]
    acc = np.flatnonzero(fused.accepted)
    ra = r[acc]
    used_gap = gap[usable].any(axis=0)
    start, end, why, lg = beat_windows(ra, fs, rec.n_samples, used_gap, cfg.segment)
    res.logs.append(lg)
    for k, i in enumerate(acc):
        reasons[i] += why[k]
    if not slot_ok.any():
        for i in acc:
            reasons[i].append("lead_missing")
    elif cfg.leads.drop_incomplete_beats and not slot_ok.all():
        for i in acc:
            reasons[i].append("lead_missing")

    # cut every beat with a valid window (the quality scores need them), for the axis leads
    valid = np.array([not why[k] for k in range(acc.size)], bool)
    vi = acc[valid]
    sig_ax = y[rows_src]
    beats_mv, lg = cut_and_resample(sig_ax, start[valid], end[valid], cfg.resample.n_samples, fs)
    res.logs.append(lg)
    beats_mv[:, ~slot_ok, :] = 0.0

    # quality scores on the used axis leads
    q = cfg.quality
    hf, cut = high_freq(notched[rows_src], fs)
    use = np.flatnonzero(slot_ok)
    tc = np.full(n, np.nan)
    hfr = np.full(n, np.nan)
    badf = np.full(n, np.nan)
    if vi.size and use.size:
        tc_all = template_corr(beats_mv[:, use], q.template_beats)
        tc[vi] = np.median(tc_all, axis=1)
        hfr[vi] = np.median(hf_ratio(hf[use], beats_mv[:, use], start[valid], end[valid]), axis=1)
        badf[vi] = window_fraction(bad[[rows_src[j] for j in use]], start[valid],
                                   end[valid]).max(axis=1)
    flags: list[list[str]] = [[] for _ in range(n)]
    if cfg.labels.exclude_annotated_noise and rec.annotations is not None:
        channels = rec.channels or list(range(len(rec.leads)))
        noisy = noise_stretches(rec.annotations, rec.n_samples, channels)
        used_ax = [rows_src[j] for j in use]
        if used_ax and noisy[used_ax].any():
            hit = window_fraction(noisy[used_ax], start[valid], end[valid]).max(axis=1) > 0
            for i in vi[hit]:
                reasons[i].append("annotated_noise")
    for i in vi:
        if badf[i] > q.max_bad_fraction_in_beat:
            reasons[i].append("flat_or_clipped")
        if hfr[i] > q.max_hf_ratio:
            reasons[i].append("high_freq_noise")
        if tc[i] < q.exclude_template_corr:
            reasons[i].append("unlike_neighbours")
        elif tc[i] < q.flag_template_corr:
            flags[i].append("unlike_neighbours")
        if not slot_ok.all():
            flags[i].append("partial_leads")
    res.logs.append(StageLog("quality", params={k: getattr(q, k) for k in q.__dataclass_fields__},
                             derived={"high_freq_cut_hz": cut},
                             counts={c: sum(c in x for x in reasons) for c in
                                     ("flat_or_clipped", "high_freq_noise", "unlike_neighbours")}))

    included = np.array([not x for x in reasons], bool)
    tensor_index = np.full(n, -1, np.int64)
    tensor_index[included] = np.arange(int(included.sum()))
    pos_in_valid = np.full(n, -1, np.int64)
    pos_in_valid[vi] = np.arange(vi.size)
    res.tensor = beats_mv[pos_in_valid[included]]
    res.mask = np.broadcast_to(slot_ok, (res.tensor.shape[0], n_ax)).copy()

    rr_prev, rr_next = _rr(r, ra, fs)
    labels = attach_labels(r, rec.annotations, fs, cfg.labels.window_ms)
    if rec.annotations is not None and ra.size >= 20:
        n_ann = int(np.isin(rec.annotations.symbol, list(BEAT_SYMBOLS)).sum())
        hit = float((labels[fused.accepted] != "").mean())
        if n_ann >= 20 and hit < 0.5:
            res.warnings.append(f"reference annotations ({rec.annotations.source}) do not fit this "
                                f"signal: only {hit:.0%} of detected beats have one within "
                                f"{cfg.labels.window_ms:g} ms; labels not attached (is the file "
                                "for another record?)")
            labels = np.full(r.size, "", dtype=object)
    res.beats = pd.DataFrame({
        "beat_id": [f"{rec.name}:{int(s)}" for s in r], "record": rec.name,
        "r_sample": r.astype(np.int64), "r_time_s": r / fs, "rr_prev_s": rr_prev,
        "rr_next_s": rr_next, "included": included,
        "reasons": [R.join(x) for x in reasons], "tensor_index": tensor_index,
        "flags": [R.join(x) if inc else "" for x, inc in zip(flags, included)],
        "label": labels.astype(str), "class": beat_classes(labels, mapping).astype(str),
        "rhythm": rhythm_at(r, rec.annotations).astype(str), "detect_conf": np.round(fused.confidence, 6),
        "n_leads_seen": fused.support.sum(axis=1).astype(np.int64),
        "template_corr": np.round(tc, 6), "hf_ratio": np.round(hfr, 6),
        "bad_fraction": np.round(badf, 6)})
    return res


def _rr(r: np.ndarray, accepted: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """RR to the previous and next fusion-accepted beat, in s (NaN where there is none)."""
    k = np.searchsorted(accepted, r, side="left")
    prev = np.where(k > 0, accepted[np.clip(k - 1, 0, None)], -1) if accepted.size else np.full(r.size, -1)
    k2 = np.searchsorted(accepted, r, side="right")
    nxt = (np.where(k2 < accepted.size, accepted[np.clip(k2, 0, accepted.size - 1)], -1)
           if accepted.size else np.full(r.size, -1))
    rp = np.where(prev >= 0, (r - prev) / fs, np.nan)
    rn = np.where(nxt >= 0, (nxt - r) / fs, np.nan)
    return rp, rn


def _fault_reason(f: dict) -> str:
    parts = [(f["flat_fraction"], "flat (lead-off)"), (f["clipped_fraction"], "clipped"),
             (f["missing_fraction"], "missing samples")]
    share, what = max(parts)
    return f"only {f['usable_fraction']:.0%} usable; mostly {what} ({share:.0%})"


def safe_process(rec_loader: Callable[[], Record], name: str, cfg: Config,
                 axis: list[str], mapping: dict[str, str] | None = None) -> RecordResult:
    """Read and process one record; any failure becomes a ``failed`` result with a message."""
    try:
        rec = rec_loader()
        return process_record(rec, cfg, axis, mapping)
    except BeatmillError as exc:
        return RecordResult(name, "failed", error=str(exc))
    except MemoryError:
        return RecordResult(name, "failed", error="out of memory while processing; process the "
                                                  "record alone or with fewer workers")
    except Exception as exc:  # a bug or an unforeseen input: the batch goes on, the log keeps it
        log.debug("unexpected error in %s:\n%s", name, traceback.format_exc())
        return RecordResult(name, "failed", error=f"unexpected {type(exc).__name__}: {exc} "
                                                  "(please report this with the record)")
