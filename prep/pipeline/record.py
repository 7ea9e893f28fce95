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

from prep.quality import reasons as R
from prep.stages.bandpass import bandpass
from prep.stages.baseline import remove_baseline
from prep.config import Config
from prep.errors import BeatmillError, RecordError
from prep.stages.labels import attach_labels, beat_classes, noise_stretches, rhythm_at
from prep.leads import match_lead
from prep.model import Record, StageLog
from prep.model import BEAT_SYMBOLS
from prep.stages.powerline import remove_powerline
from prep.quality.scores import hf_ratio, high_freq, lead_faults, qrs_match, template_corr, window_fraction
from prep.stages.resample import cut_and_resample
from prep.stages.rpeaks import detect_leads, fuse_leads
from prep.quality.windows import grade_codes, lead_windows
from prep.stages.segment import beat_windows

log = logging.getLogger("prep")

BEAT_COLUMNS = ["beat_id", "record", "r_sample", "r_time_s", "rr_prev_s", "rr_next_s", "included",
                "is_beat", "reasons", "tensor_index", "flags", "label", "class", "rhythm", "detect_conf", "n_leads_seen",
                "template_corr", "qrs_match", "hf_ratio", "bad_fraction", "amplitude_z",
                "window_grade", "second_detector"]
BEAT_TYPES = ["str", "str", "int64", "float64", "float64", "float64", "bool", "bool", "str",
              "int64",
              "str", "str", "str", "str", "float64", "int64", "float64", "float64", "float64",
              "float64", "float64", "str", "bool"]  # one per column of BEAT_COLUMNS


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
    windows: pd.DataFrame | None = None        # one row per lead and quality window
    class_yield: dict = field(default_factory=dict)  # class -> reference / detected / kept
    store: object | None = None                # shards.ShardTables: tables left on storage

    @property
    def n_beats(self) -> int:
        if self.beats is None and self.store is not None:
            return int(self.store.n_rows.get("beats") or 0)
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
    return pd.DataFrame({c: pd.Series(dtype=t) for c, t in zip(BEAT_COLUMNS, BEAT_TYPES)})


def process_record(rec: Record, cfg: Config, axis: list[str],
                   mapping: dict[str, str] | None = None) -> RecordResult:
    """Run every stage on one record. Raises :class:`RecordError` for record-level failures.

    ``mapping``: symbol -> class overrides (see :func:`prep.stages.labels.load_mapping`).
    """
    fs = rec.fs
    n_ax = len(axis)
    n_l = len(rec.leads)
    res = RecordResult(rec.name, "ok", fs=fs, duration_s=rec.duration_s, n_leads=n_l,
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
    bad, masks, fault = lead_faults(raw, fs, cfg.quality, gap)
    usable = np.array([f["usable_fraction"] >= cfg.quality.min_usable_fraction for f in fault])
    lead_reason = ["" if u else _fault_reason(f) for u, f in zip(usable, fault)]

    y, lg = remove_powerline(raw, fs, cfg.powerline)
    res.logs.append(lg)
    mains = lg.derived.get("mains_hz")
    notched = y
    y, lg = bandpass(y, fs, cfg.bandpass)
    res.logs.append(lg)
    y, lg = remove_baseline(y, fs, cfg.baseline)
    res.logs.append(lg)

    # per-lead detection, a second detector, and window grades
    dets = {d.lead: d for d in detect_leads(y, fs, usable, cfg.rpeaks)}
    for d in dets.values():  # no beat inside a gap: the bridged line there is not signal
        inside = ~gap[d.lead][d.r]
        d.r, d.conf = d.r[inside], d.conf[inside]
    other = {j: second_detector(y[j], fs) for j in dets} if cfg.windows.enabled else {}
    empty = np.zeros(0, np.int64)
    win_tables, grades, rhythm, one_shape = [], {}, {}, {}
    for j in range(n_l):
        w = lead_windows(notched[j], y[j], masks[j], fs, dets[j].r if j in dets else empty,
                         other.get(j, empty), mains, cfg.windows, grade=cfg.windows.enabled)
        grades[j] = grade_codes(w["grade"])
        rhythm[j] = (w["rhythm_findings"] != "").to_numpy()
        one_shape[j] = (w["tsqi_average"].fillna(-1) >= cfg.windows.tsqi_noisy).to_numpy()
        w.insert(0, "lead", rec.leads[j])
        w.insert(0, "record", rec.name)
        win_tables.append(w)
    res.windows = pd.concat(win_tables, ignore_index=True)
    L = int(round(cfg.windows.window_s * fs))
    for j in list(dets):
        share = float((grades[j] < 2).mean())
        if dets[j].r.size == 0:
            usable[j] = False
            lead_reason[j] = "no beats found in this lead"
        elif share < cfg.quality.min_usable_fraction:
            usable[j] = False
            top = _main_fault(res.windows[(res.windows.lead == rec.leads[j])])
            lead_reason[j] = f"only {share:.0%} of its windows usable; mostly {top}"
    res.logs.append(StageLog("lead_faults", params={"flat_ms": cfg.quality.flat_ms,
                                                    "clip_run_samples": cfg.quality.clip_run_samples,
                                                    "min_usable_fraction":
                                                        cfg.quality.min_usable_fraction},
                             derived={rec.leads[j]: {**fault[j], "rejected": lead_reason[j]}
                                      for j in range(n_l)}))
    res.logs.append(StageLog("windows", params={k: getattr(cfg.windows, k)
                                                for k in cfg.windows.__dataclass_fields__},
                             derived={"window_samples": L, "second_detector":
                                      "neurokit2.ecg_findpeaks(method='neurokit')"},
                             counts={g: int((res.windows.grade == g).sum())
                                     for g in ("good", "noisy", "unusable")}))
    use_dets = [dets[j] for j in sorted(dets) if usable[j]]
    valid = [grades[d.lead][np.minimum(d.r // L, grades[d.lead].size - 1)] < 2 for d in use_dets]
    fused, lg = fuse_leads(use_dets, n_l, fs, cfg.rpeaks, rec.leads, valid,
                           [grades[d.lead] < 2 for d in use_dets], L,
                           clean=[grades[d.lead] == 0 for d in use_dets])
    res.logs.append(lg)
    res.leads = [_lead_row(rec, j, usable[j], lead_reason[j], axis, fault[j],
                           res.windows[res.windows.lead == rec.leads[j]]) for j in range(n_l)]
    for name, why in rec.skipped:
        res.leads.append({"record": rec.name, "lead": name, "source_name": name, "used": False,
                          "reason": why, "in_axis": False})
    if not usable.any():
        res.status = "no_usable_lead"
        res.error = "no usable ECG lead: " + "; ".join(
            f"{rec.leads[j]}: {lead_reason[j]}" for j in range(n_l))
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
    reasons: list[list[str]] = [[] if a else (["between_beats"] if b else ["unusable_window"]
                                              if u else ["one_lead_only"])
                                for a, u, b in zip(fused.accepted, fused.unusable, fused.between)]
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
    valid_w = np.array([not why[k] for k in range(acc.size)], bool)
    vi = acc[valid_w]
    sv, ev = start[valid_w], end[valid_w]
    beats_mv, lg = cut_and_resample(y[rows_src], sv, ev, cfg.resample.n_samples, fs)
    res.logs.append(lg)
    # per beat and axis slot: the window grade of that lead at R; unusable slots are masked
    g_slot = np.full((vi.size, n_ax), 2, np.int8)
    rhythm_slot = np.zeros((vi.size, n_ax), bool)
    for k, src in enumerate(rows_src):
        if slot_ok[k]:
            at = np.minimum(r[vi] // L, grades[src].size - 1)
            g_slot[:, k] = grades[src][at]
            rhythm_slot[:, k] = rhythm[src][at]
    beat_mask = slot_ok[None, :] & (g_slot < 2)
    # leads the reference annotator marked noisy/unreadable at a beat are masked for that beat
    all_noisy = np.zeros(vi.size, bool)
    if cfg.labels.exclude_annotated_noise and rec.annotations is not None and vi.size:
        channels = rec.channels or list(range(n_l))
        noisy_ann = noise_stretches(rec.annotations, rec.n_samples, channels)
        if noisy_ann.any():
            ann = (window_fraction(noisy_ann[rows_src], sv, ev) > 0) & beat_mask
            all_noisy = beat_mask.any(axis=1) & ~(beat_mask & ~ann).any(axis=1)
            beat_mask &= ~ann
    # a lead flat or clipped in a beat's window is masked for that beat when another lead it
    # keeps is sound there (a large ectopic beat at the converter's rail keeps its other leads);
    # with no sound lead left the beat is excluded (flat_or_clipped, below)
    if vi.size:
        faulty = (window_fraction(bad[rows_src], sv, ev) > cfg.quality.max_bad_fraction_in_beat) \
            & beat_mask
        spare = (beat_mask & ~faulty).any(axis=1)
        beat_mask &= ~(faulty & spare[:, None])
    beats_mv[~beat_mask] = 0.0

    # a beat is "in noise" when every lead it keeps is noisy there by a noise test
    in_noise = ((g_slot >= 1) | ~beat_mask).all(axis=1) & beat_mask.any(axis=1)
    scores = _beat_scores(r, vi, sv, ev, beats_mv, beat_mask, rows_src, notched, bad, fs, cfg,
                          other, usable, ra, fused.support.sum(axis=1), fused.confidence)
    scores["_in_noise"] = in_noise
    scores["_n_seen"] = fused.support.sum(axis=1)[vi]
    n_usable_here = np.zeros(vi.size, np.int64)
    for j in np.flatnonzero(usable):
        n_usable_here += grades[j][np.minimum(r[vi] // L, grades[j].size - 1)] < 2
    scores["_n_here"] = n_usable_here
    scores["_lone"] = (n_usable_here <= 1) & (int(usable.sum()) >= 2)
    library_ok = {j: (grades[j] == 0) & one_shape[j] for j in grades}
    scores["qrs_match"], scores["_qrs_library"] = _qrs_match(y, r, vi, usable, grades,
                                                             library_ok, L, fs, cfg.quality)
    scores["_noise_any"] = ((g_slot >= 1) & beat_mask).any(axis=1)
    scores["_rhythm"] = (rhythm_slot & beat_mask).any(axis=1)
    flags: list[list[str]] = [[] for _ in range(n)]
    _beat_reasons(reasons, flags, vi, scores, beat_mask, g_slot, slot_ok, cfg, res, all_noisy)

    included = np.array([not x for x in reasons], bool)
    tensor_index = np.full(n, -1, np.int64)
    tensor_index[included] = np.arange(int(included.sum()))
    pos_in_valid = np.full(n, -1, np.int64)
    pos_in_valid[vi] = np.arange(vi.size)
    res.tensor = beats_mv[pos_in_valid[included]].astype(np.float32)  # as stored in shards
    res.mask = beat_mask[pos_in_valid[included]]

    # heartbeats: every row but detections judged not to be one; RR runs between heartbeats only
    is_beat = np.array([not any(R.group(c) == R.NOT_A_BEAT for c in x) for x in reasons], bool)
    rr_prev, rr_next = _rr(r, r[is_beat], fs)
    # a detection that could not be confirmed in noise may have been a heartbeat: where one lies
    # between a row and its neighbouring heartbeat, that RR is unknown (NaN), not a guess
    unsure = np.array([any(c in _UNCONFIRMED for c in x) for x in reasons], bool)
    rr_prev, rr_next = _unknown_across(r, r[unsure & ~is_beat], rr_prev, rr_next, fs)
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
    classes = beat_classes(labels, mapping).astype(str)
    res.class_yield = class_yield(r, included, rec.annotations, fs, cfg.labels.window_ms, mapping)
    res.beats = pd.DataFrame({
        "beat_id": [f"{rec.name}:{int(s)}" for s in r], "record": rec.name,
        "r_sample": r.astype(np.int64), "r_time_s": r / fs, "rr_prev_s": rr_prev,
        "rr_next_s": rr_next, "included": included, "is_beat": is_beat,
        "reasons": [R.join(x) for x in reasons], "tensor_index": tensor_index,
        "flags": [R.join(x) if inc else "" for x, inc in zip(flags, included)],
        "label": labels.astype(str), "class": classes,
        "rhythm": rhythm_at(r, rec.annotations).astype(str),
        "detect_conf": np.round(fused.confidence, 6),
        "n_leads_seen": fused.support.sum(axis=1).astype(np.int64),
        **{k: (np.round(v, 6) if v.dtype.kind == "f" else v) for k, v in scores.items()}})
    return res


def class_yield(r: np.ndarray, included: np.ndarray, ann, fs: float, window_ms: float,
                mapping: dict[str, str] | None = None) -> dict[str, dict[str, int]]:
    """Per reference class: reference beats, those a row was found for, and those kept.

    Reference beats and rows are matched one to one within ``window_ms`` (the EC57 walk of
    :func:`prep.evaluate.match_pairs`), so a reference beat is counted once whatever labels
    the rows got. Empty where the record has no reference beat annotations.

    >>> from prep.model import Annotations
    >>> a = Annotations(np.array([100, 400, 700]), np.array(["N", "V", "N"], dtype=object))
    >>> class_yield(np.array([101, 402]), np.array([True, False]), a, 1000.0, 150)
    {'N': {'reference': 2, 'detected': 1, 'kept': 1}, 'V': {'reference': 1, 'detected': 1, 'kept': 0}}
    """
    from prep.evaluate import match_pairs
    if ann is None:
        return {}
    sel = np.isin(ann.symbol, list(BEAT_SYMBOLS))
    if not sel.any():
        return {}
    order = np.argsort(ann.sample[sel], kind="stable")
    ref, sym = ann.sample[sel][order], ann.symbol[sel][order]
    cls = beat_classes(sym, mapping).astype(str)
    _, ref_to_row = match_pairs(r, ref, fs, window_ms)
    found = ref_to_row >= 0
    kept = found & included[np.maximum(ref_to_row, 0)]
    return {str(c): {"reference": int((cls == c).sum()), "detected": int((found & (cls == c)).sum()),
                "kept": int((kept & (cls == c)).sum())} for c in sorted(set(cls))}


def _lead_row(rec: Record, j: int, used: bool, reason: str, axis: list[str], fault: dict,
              w: pd.DataFrame) -> dict:
    counts = w["grade"].value_counts()
    return {"record": rec.name, "lead": rec.leads[j], "source_name": rec.lead_names[j],
            "used": bool(used), "reason": reason,
            "in_axis": match_lead(rec.leads[j], axis) is not None, **fault,
            "windows_good": int(counts.get("good", 0)), "windows_noisy": int(counts.get("noisy", 0)),
            "windows_unusable": int(counts.get("unusable", 0)),
            "usable_share": float((w["grade"] != "unusable").mean()) if len(w) else 0.0,
            "main_fault": _main_fault(w)}


_FAULT_ORDER = ["fault_fraction", "amplitude_mv", "bsqi", "tsqi", "ksqi", "bassqi", "psqi",
                "hf_ratio", "line_ratio", "hr_bpm", "max_rr_s", "rr_ratio"]


def _main_fault(w: pd.DataFrame) -> str:
    """The test that most often decided a lead's non-good windows ('' when all good); ties go to
    the more direct test, and a fault share is named by its kind (flat, clipped, missing)."""
    bad = w[w["grade"] != "good"]
    parts = [p for cell in bad["decided_by"] for p in cell.split(";") if p]
    if not parts:
        return ""
    rank = {k: i for i, k in enumerate(_FAULT_ORDER)}
    top = min(set(parts), key=lambda k: (-parts.count(k), rank.get(k, 99)))
    if top == "fault_fraction":
        kinds = {k: float(bad[f"{k}_fraction"].sum()) for k in ("flat", "clipped", "missing")}
        return max(kinds, key=kinds.get)
    return top


def second_detector(x: np.ndarray, fs: float) -> np.ndarray:
    """R peaks from neurokit2's own detector on the filtered lead (for bSQI and agreement)."""
    import warnings

    import neurokit2 as nk
    # the lead is already band-limited to 40 Hz, so keeping every q-th sample down to >= 90 Hz
    # does not alias it; the peer detector then runs q times faster (R within +-q samples)
    q = max(1, int(fs // 90))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            p = nk.ecg_findpeaks(x[::q], sampling_rate=int(round(fs / q)),
                                 method="neurokit")["ECG_R_Peaks"]
        return np.sort(np.asarray(p, dtype=np.int64) * q)
    except Exception:  # a failing peer detector means no agreement, recorded as such
        return np.zeros(0, np.int64)


def _beat_scores(r, vi, sv, ev, beats_mv, beat_mask, rows_src, notched, bad, fs, cfg, other,
                 usable, ra, support_count, confidence) -> dict[str, np.ndarray]:
    """Per-beat scores for every row (NaN where the beat has no window)."""
    n = r.size
    q = cfg.quality
    out = {k: np.full(n, np.nan) for k in ("template_corr", "hf_ratio", "bad_fraction",
                                           "amplitude_z")}
    out["window_grade"] = np.full(n, "", dtype=object)
    # the second detector: any used lead's neurokit2 peak within 150 ms
    tol = 0.15 * fs
    agree = np.zeros(n, bool) if cfg.windows.enabled else np.ones(n, bool)
    for j, p in other.items():
        if usable[j] and p.size:
            k = np.clip(np.searchsorted(p, r), 1, p.size - 1) if p.size > 1 else np.zeros(n, int)
            d = np.minimum(np.abs(p[np.maximum(k - 1, 0)] - r), np.abs(p[k] - r))
            agree |= d <= tol
    out["second_detector"] = agree
    n_used = int(usable.sum())
    out["_weak"] = (support_count < n_used) | (confidence < 1.0)
    out["_rr_prev"], out["_rr_next"] = _rr(r, ra, fs)
    # another accepted R inside the beat's window (its own R excluded)
    lo = np.searchsorted(ra, sv, side="left")
    hi = np.searchsorted(ra, ev, side="left")
    out["_overlap"] = (hi - lo) > 1  # aligned with the cut beats (vi)
    if vi.size == 0:
        return out
    hf, _ = high_freq(notched[rows_src], fs)
    any_lead = beat_mask.any(axis=1)
    tc = template_corr(beats_mv, q.template_beats)            # (n_v, n_ax)
    hfr = hf_ratio(hf, beats_mv, sv, ev)
    badf = window_fraction(bad[rows_src], sv, ev)
    out["template_corr"][vi] = _masked_median(tc, beat_mask)
    out["hf_ratio"][vi] = _masked_median(hfr, beat_mask)
    out["bad_fraction"][vi] = np.where(any_lead, np.max(np.where(beat_mask, badf, 0.0), axis=1),
                                       np.nan)
    ptp = beats_mv.max(axis=2) - beats_mv.min(axis=2)
    amp = _masked_median(ptp, beat_mask)
    la = np.log(np.maximum(amp, 1e-6))
    ok = np.isfinite(la)
    if ok.sum() >= 3:
        med = np.median(la[ok])
        mad = 1.4826 * np.median(np.abs(la[ok] - med))
        out["amplitude_z"][vi] = np.abs(la - med) / max(mad, 0.1)
    return out


def _qrs_match(y, r, vi, usable, grades, library_ok, L, fs, q) -> tuple[np.ndarray, int]:
    """qrs_match for every row (NaN where the beat has no window), and the number of clean
    beats compared against: the cut beats whose every usable lead is in a window graded good
    (the grade holds no rhythm test, so a stretch of bigeminy gives its ectopic beats to the
    library)."""
    out = np.full(r.size, np.nan)
    if vi.size == 0:
        return out, 0
    rv = r[vi]
    g = np.stack([grades[j][np.minimum(rv // L, grades[j].size - 1)] for j in range(len(grades))],
                 axis=1)
    lead_ok = usable[None, :] & (g < 2)
    lib = np.stack([library_ok[j][np.minimum(rv // L, library_ok[j].size - 1)]
                    for j in range(len(grades))], axis=1)
    clean = lib | ~usable[None, :]
    library = rv[clean.all(axis=1) & lead_ok.any(axis=1)]
    out[vi] = qrs_match(y, rv, lead_ok, library, fs, q.qrs_half_ms, q.qrs_match_k,
                        q.qrs_library_beats)
    return out, int(min(library.size, q.qrs_library_beats))


def _masked_median(v: np.ndarray, mask: np.ndarray) -> np.ndarray:
    w = np.where(mask, v, np.nan)
    ok = mask.any(axis=1)
    out = np.full(v.shape[0], np.nan)
    if ok.any():
        out[ok] = np.nanmedian(w[ok], axis=1)
    return out


def _beat_reasons(reasons, flags, vi, scores, beat_mask, g_slot, slot_ok, cfg, res,
                  all_noisy) -> None:
    """Turn scores and window grades into reason codes and flags (in place)."""
    q, wq = cfg.quality, cfg.windows
    for i in vi[all_noisy]:
        reasons[i].append("annotated_noise")
    # inside annotated noise, a beat the second detector does not confirm is not counted as one
    if q.exclude_detector_disagreement:
        for i in vi[all_noisy & ~scores["second_detector"][vi]]:
            reasons[i].append("detector_disagreement")
    n_ax = beat_mask.shape[1]
    has = beat_mask.any(axis=1)
    noisy_w = ((g_slot == 1) & beat_mask).any(axis=1) & has
    tc = scores["template_corr"][vi]
    # a disagreement excludes only a weakly supported beat: one that some used lead missed, whose
    # envelope is below a typical beat's, or that no good window vouches for; a strong beat seen
    # in every lead in a good window (a wide ectopic beat the peer misses) is kept with a flag
    weak = scores.pop("_weak")[vi] | (((g_slot >= 1) | ~beat_mask).all(axis=1) & has)
    in_noise = scores.pop("_in_noise")
    # a beat in noise must be seen by every lead usable there and look like the record's clean
    # beats: a low qrs_match is unmatched_in_noise (below); where the record has too few clean
    # beats for qrs_match, the beat must be like the running template instead
    qm = scores["qrs_match"][vi]
    unlike = np.isnan(qm) & ~(tc >= q.noise_min_template_corr)
    missed = scores.pop("_n_seen") < scores.pop("_n_here")
    unconfirmed = missed | unlike
    lone = scores.pop("_lone")  # no second usable lead there: a stricter QRS match is needed
    if q.lone_lead_min_qrs_match > -1:
        unconfirmed |= lone & ~(qm >= q.lone_lead_min_qrs_match)
    checks = [
        (has & ((in_noise & unconfirmed) |
                (noisy_w & missed & ~(qm >= q.missed_min_qrs_match))), reasons, "weak_in_noise"),
        (has & scores.pop("_noise_any") & (qm < q.noise_min_qrs_match), reasons,
         "unmatched_in_noise"),
        (~has & slot_ok.any() & ~all_noisy, reasons, "unusable_window"),
        (noisy_w, reasons if wq.exclude_noisy else flags, "noisy_window"),
        (has & (scores["bad_fraction"][vi] > q.max_bad_fraction_in_beat), reasons,
         "flat_or_clipped"),
        (has & (scores["hf_ratio"][vi] > q.max_hf_ratio), reasons, "high_freq_noise"),
        (has & (tc < q.exclude_template_corr), reasons, "unlike_neighbours"),
        (has & (tc >= q.exclude_template_corr) & (tc < q.flag_template_corr), flags,
         "unlike_neighbours"),
        (has & (scores["amplitude_z"][vi] > q.amplitude_z_max), reasons, "amplitude_outlier"),
        (has & ~scores["second_detector"][vi] & weak & q.exclude_detector_disagreement, reasons,
         "detector_disagreement"),
        (has & ~scores["second_detector"][vi] & ~(weak & q.exclude_detector_disagreement), flags,
         "detector_disagreement"),
        (has & (beat_mask.sum(axis=1) < n_ax), flags, "partial_leads"),
        (has & scores.pop("_rhythm"), flags, "unusual_rhythm"),
    ]
    for hit, target, code in checks:  # one step per rule, not per beat
        for i in vi[np.flatnonzero(hit)]:
            target[i].append(code)
    # window grade of each cut beat: the worst among the leads it keeps
    names = np.array(["good", "noisy", "unusable"], dtype=object)
    worst = np.where(beat_mask, g_slot, -1).max(axis=1)
    scores["window_grade"][vi] = np.where(worst >= 0, names[np.clip(worst, 0, 2)], "unusable")
    # rhythm: refractory, pauses, overlapping neighbours (over fusion-accepted beats)
    rr_p, rr_n = scores.pop("_rr_prev")[vi], scores.pop("_rr_next")[vi]
    overlap = scores.pop("_overlap")
    pause = np.maximum(np.nan_to_num(rr_p), np.nan_to_num(rr_n)) > q.long_pause_s
    for hit, target, code in ((rr_p < q.min_rr_s, reasons, "rr_too_short"),
                              (pause, reasons if q.exclude_long_pause else flags, "long_pause"),
                              (overlap, reasons if q.exclude_overlapping else flags,
                               "overlaps_neighbour")):
        for i in vi[np.flatnonzero(hit)]:
            target[i].append(code)
    n_lib = scores.pop("_qrs_library")
    res.logs.append(StageLog("quality", params={k: getattr(q, k) for k in q.__dataclass_fields__},
                             derived={"qrs_match_clean_beats": n_lib,
                                      "qrs_match": "computed" if n_lib > q.qrs_match_k else
                                      "too few clean beats: NaN, running-template test used"},
                             counts={c: sum(c in x for x in reasons) for c in
                                     ("flat_or_clipped", "high_freq_noise", "unlike_neighbours",
                                      "unmatched_in_noise", "weak_in_noise",
                                      "amplitude_outlier", "detector_disagreement",
                                      "unusable_window", "annotated_noise", "rr_too_short")}))


def _rr(r: np.ndarray, accepted: np.ndarray, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """RR of every row to the previous and next of the beats ``accepted`` (sorted R samples),
    in s (NaN where there is none)."""
    k = np.searchsorted(accepted, r, side="left")
    prev = np.where(k > 0, accepted[np.clip(k - 1, 0, None)], -1) if accepted.size else np.full(r.size, -1)
    k2 = np.searchsorted(accepted, r, side="right")
    nxt = (np.where(k2 < accepted.size, accepted[np.clip(k2, 0, accepted.size - 1)], -1)
           if accepted.size else np.full(r.size, -1))
    rp = np.where(prev >= 0, (r - prev) / fs, np.nan)
    rn = np.where(nxt >= 0, (nxt - r) / fs, np.nan)
    return rp, rn


#: reasons of detections that are not counted as heartbeats for want of confirmation (rather
#: than contradicted by the signal): an RR across one of them is unknown
_UNCONFIRMED = ("weak_in_noise", "unmatched_in_noise", "detector_disagreement", "unusable_window")


def _unknown_across(r, unsure, rr_prev, rr_next, fs):
    """RR intervals set to NaN where an unconfirmed detection lies strictly inside them.

    >>> _unknown_across(np.array([0, 100, 200]), np.array([150]), np.array([np.nan, 1., 1.]),
    ...                 np.array([1., 1., np.nan]), 100.0)
    (array([nan,  1., nan]), array([ 1., nan, nan]))
    """
    if unsure.size == 0:
        return rr_prev, rr_next
    u = np.sort(unsure)
    prev = r - np.nan_to_num(rr_prev) * fs
    nxt = r + np.nan_to_num(rr_next) * fs
    across_p = np.searchsorted(u, r, "left") > np.searchsorted(u, prev, "right")
    across_n = np.searchsorted(u, nxt, "left") > np.searchsorted(u, r, "right")
    return np.where(across_p, np.nan, rr_prev), np.where(across_n, np.nan, rr_next)


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
