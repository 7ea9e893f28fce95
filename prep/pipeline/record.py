"""One record through every stage: a short sequence of named steps over one state object.

Stages are pure functions; this module only moves arrays between them, turns NaN stretches into
gaps before any stage runs, collects each stage's :class:`StageLog`, and catches a record's
failure so that the batch goes on. The steps, in order (each a function below):

1. ``_condition``  - gaps, lead faults, powerline, band-pass, baseline
2. ``_grade_leads`` - per-lead detection, the second detector, window grades, lead rejection
3. ``_fuse``       - multi-lead fusion and the lead table
4. ``_cut``        - beat windows, cut and resample, window grades per axis slot
5. ``_mask``       - leads masked per beat (annotated noise, flat or clipped leads)
6. ``_score``      - the evidence the quality rules read (:class:`prep.quality.rules.BeatEvidence`)
7. ``_decide``     - reason codes and flags (:func:`prep.quality.rules.decide`)
8. ``tabulate``    - tensor rows, heartbeats, RR, labels and the beat table (tabulate.py)
"""
from __future__ import annotations

import logging
import traceback
from dataclasses import dataclass
from typing import Callable

import numpy as np

from prep.config import Config
from prep.errors import BeatmillError, RecordError
from prep.leads import match_lead
from prep.model import Record, StageLog
from prep.pipeline.result import RecordResult
from prep.pipeline.rr import rr_to_beats
from prep.pipeline.signals import SECOND_DETECTOR, fill_gaps, second_detector_leads
from prep.pipeline.tabulate import lead_row, tabulate
from prep.quality.faults import (copied_leads, fault_reason, lead_faults, usable_of_recorded,
                                 window_fraction)
from prep.quality.rules import BeatEvidence, clean_median_rr, decide, quality_log
from prep.quality.scores import cut_beat_scores, detector_agreement, high_freq, qrs_match
from prep.quality.windows import (add_verdicts, grade_codes, join_columns, main_fault,
                                  signal_index_columns, window_columns)
from prep.schema import empty_beats
from prep.stages._fusion import PRUNE_RR
from prep.stages.bandpass import bandpass
from prep.stages.baseline import remove_baseline
from prep.stages.labels import noise_stretches
from prep.stages.powerline import remove_powerline
from prep.stages.resample import cut_and_resample
from prep.stages.rpeaks import detect_leads, fuse_leads
from prep.stages.segment import beat_windows

log = logging.getLogger("prep")


@dataclass
class _State:
    """What the steps hand each other for one record (filled in step order)."""

    rec: Record
    cfg: Config
    axis: list[str]
    res: RecordResult
    # _condition
    gap: np.ndarray = None          # (n_leads, n) missing samples
    bad: np.ndarray = None          # (n_leads, n) flat, clipped or missing
    masks: list = None              # per lead: {"flat", "clipped", "missing"}
    fault: list = None              # per lead: fault shares
    usable: np.ndarray = None       # (n_leads,) lead used for detection
    lead_reason: list = None        # per lead: why rejected ('' when used)
    notched: np.ndarray = None      # after the notch only
    y: np.ndarray = None            # after every filter
    mains: float | None = None
    # _grade_leads
    dets: dict = None               # lead -> LeadDetections
    other: dict = None              # lead -> the second detector's R samples
    lead_windows: list = None       # per lead: its window columns (window_columns)
    grades: dict = None             # lead -> window grades 0/1/2
    rhythm: dict = None             # lead -> window has a rhythm finding
    one_shape: dict = None          # lead -> window's beats agree with their average
    L: int = 0                      # window length in samples
    # _fuse
    fused: object = None
    # _cut
    reasons: list = None            # per row: reason codes
    flags: list = None              # per row: flags
    slot_ok: np.ndarray = None      # (n_axis,)
    rows_src: list = None           # record lead filling each axis slot
    ra: np.ndarray = None           # fusion-accepted R samples
    vi: np.ndarray = None           # rows of the cut beats
    sv: np.ndarray = None
    ev: np.ndarray = None
    beats_mv: np.ndarray = None     # (n_cut, n_axis, n_samples)
    g_slot: np.ndarray = None       # (n_cut, n_axis) grade of the slot's lead at R
    rhythm_slot: np.ndarray = None
    mask: np.ndarray = None         # (n_cut, n_axis) slot kept for the beat
    annotated: np.ndarray = None    # (n_cut,) every kept lead inside annotated noise
    # _score / _decide
    evidence: BeatEvidence = None
    scores: dict = None             # beat-table score columns over every row
    n_library: int = 0


def beats_of_record(rec: Record, cfg: Config, axis: list[str],
                    mapping: dict[str, str] | None = None) -> RecordResult:
    """Run every stage on one record. Raises :class:`RecordError` for record-level failures.

    ``mapping``: symbol -> class overrides (see :func:`prep.stages.labels.load_mapping`).
    """
    res = RecordResult(rec.name, "ok", fs=rec.fs, duration_s=rec.duration_s,
                       n_leads=len(rec.leads), inputs=rec.inputs, comments=list(rec.comments),
                       warnings=list(rec.warnings))
    _check_length(rec, cfg)
    st = _State(rec, cfg, axis, res)
    _condition(st)
    _grade_leads(st)
    _fuse(st)
    if not st.usable.any():
        return _no_usable_lead(st)
    _cut(st)
    _mask(st)
    _score(st)
    _decide(st)
    tabulate(st, mapping)
    return res


def _check_length(rec: Record, cfg: Config) -> None:
    min_len = int(round((cfg.segment.before_ms + cfg.segment.after_ms) * rec.fs / 1000))
    if rec.n_samples < max(min_len, int(2 * rec.fs)):
        raise RecordError(f"record is {rec.duration_s:.3g} s long; at least "
                          f"{max(min_len / rec.fs, 2.0):.3g} s are needed for one beat window",
                          path=rec.path, stage="segment")


def _condition(st: _State) -> None:
    """Gaps bridged, lead faults on the raw signal (before a filter smears them), filters."""
    cfg, res, fs = st.cfg, st.res, st.rec.fs
    raw, st.gap = fill_gaps(st.rec.signals)
    res.logs.append(StageLog("gaps", counts={"missing_samples": int(st.gap.sum())}))
    st.bad, st.masks, st.fault = lead_faults(raw, fs, cfg.quality, st.gap)
    # a stretch with no samples is absent data, not a bad lead: the share usable is judged over
    # the samples recorded (beats in gaps are excluded on their own, reason in_gap)
    st.usable = np.array([usable_of_recorded(f) >= cfg.quality.min_usable_fraction
                          for f in st.fault])
    st.lead_reason = ["" if u else fault_reason(f) for u, f in zip(st.usable, st.fault)]
    for j, k in copied_leads(st.rec.signals):  # one signal twice is not two leads' evidence
        if st.usable[k]:
            st.usable[k] = False
            st.lead_reason[k] = f"an exact copy of lead {st.rec.leads[j]}; that one is used"
            res.warnings.append(f"file {st.rec.path}: lead {st.rec.leads[k]} is an exact copy of "
                                f"lead {st.rec.leads[j]}; only {st.rec.leads[j]} is used")
    y, lg = remove_powerline(raw, fs, cfg.powerline)
    res.logs.append(lg)
    st.mains, st.notched = lg.derived.get("mains_hz"), y
    y, lg = bandpass(y, fs, cfg.bandpass)
    res.logs.append(lg)
    st.y, lg = remove_baseline(y, fs, cfg.baseline, start=st.rec.first_sample)
    res.logs.append(lg)


def _grade_leads(st: _State) -> None:
    """Per-lead detection, the second detector, window grades; leads rejected for them."""
    cfg, rec, res, fs = st.cfg, st.rec, st.res, st.rec.fs
    st.dets = {d.lead: d for d in detect_leads(st.y, fs, st.usable, cfg.rpeaks)}
    for d in st.dets.values():  # no beat inside a gap: the bridged line there is not signal
        inside = ~st.gap[d.lead][d.r]
        d.r, d.conf = d.r[inside], d.conf[inside]
    leads = list(st.dets)
    st.other = (dict(zip(leads, second_detector_leads(st.y[leads], fs)))
                if cfg.windows.enabled and leads else {})
    empty = np.zeros(0, np.int64)
    tables, st.grades, st.rhythm, st.one_shape = [], {}, {}, {}
    signal = (signal_index_columns(st.notched, st.y, fs, st.mains, cfg.windows)
              if cfg.windows.enabled else [None] * len(rec.leads))  # all leads in one pass
    for j in range(len(rec.leads)):
        w = window_columns(st.notched[j], st.y[j], st.masks[j], fs,
                           st.dets[j].r if j in st.dets else empty, st.other.get(j, empty),
                           st.mains, cfg.windows, grade=cfg.windows.enabled,
                           signal_columns=signal[j], verdicts=False)
        tables.append(w)
    if cfg.windows.enabled:
        add_verdicts(tables, cfg.windows)  # every lead's windows graded in one pass
    for j, w in enumerate(tables):
        st.grades[j] = grade_codes(w["grade"])
        st.rhythm[j] = np.asarray(w["rhythm_findings"], dtype=object) != ""
        st.one_shape[j] = np.nan_to_num(w["tsqi_average"], nan=-1) >= cfg.windows.tsqi_noisy
    res.windows = join_columns(tables)
    res.windows.insert(0, "lead", np.repeat(np.array(rec.leads, dtype=object),
                                            [len(w["start"]) for w in tables]))
    res.windows.insert(0, "record", rec.name)
    st.lead_windows = tables  # per lead, in lead order (names may repeat across channels)
    st.L = int(round(cfg.windows.window_s * fs))
    for j in list(st.dets):
        recorded = np.asarray(tables[j]["missing_fraction"]) < 0.5
        share = float((st.grades[j][recorded] < 2).mean()) if recorded.any() else 0.0
        if st.dets[j].r.size == 0:
            st.usable[j] = False
            st.lead_reason[j] = "no beats found in this lead"
        elif share < cfg.quality.min_usable_fraction:
            st.usable[j] = False
            top = main_fault(tables[j])
            st.lead_reason[j] = f"only {share:.0%} of its windows usable; mostly {top}"
    q = cfg.quality
    res.logs.append(StageLog("lead_faults", params={"flat_ms": q.flat_ms,
                                                    "clip_run_samples": q.clip_run_samples,
                                                    "min_usable_fraction": q.min_usable_fraction},
                             derived={rec.leads[j]: {**st.fault[j], "rejected": st.lead_reason[j]}
                                      for j in range(len(rec.leads))}))
    res.logs.append(StageLog("windows", params={k: getattr(cfg.windows, k)
                                                for k in cfg.windows.__dataclass_fields__},
                             derived={"window_samples": st.L, "second_detector": SECOND_DETECTOR},
                             counts=dict(zip(("good", "noisy", "unusable"), np.bincount(
                                 np.concatenate([st.grades[j] for j in range(len(rec.leads))]),
                                 minlength=3).tolist()))))


def _grade_at(st: _State, lead: int, r: np.ndarray, per_window: dict | None = None) -> np.ndarray:
    """A per-window value of one lead (default: its grade) at the R samples ``r``."""
    v = (per_window or st.grades)[lead]
    return v[np.minimum(r // st.L, v.size - 1)]


def _fuse(st: _State) -> None:
    """Multi-lead fusion over the usable leads, then the lead table."""
    rec, res = st.rec, st.res
    use = [st.dets[j] for j in sorted(st.dets) if st.usable[j]]
    fused, lg = fuse_leads(use, len(rec.leads), rec.fs, st.cfg.rpeaks, rec.leads,
                           [_grade_at(st, d.lead, d.r) < 2 for d in use],
                           [st.grades[d.lead] < 2 for d in use], st.L,
                           clean=[st.grades[d.lead] == 0 for d in use])
    res.logs.append(lg)
    st.fused = fused
    res.leads = [lead_row(rec, j, st.usable[j], st.lead_reason[j], st.axis, st.fault[j],
                           st.lead_windows[j])
                 for j in range(len(rec.leads))]
    for name, why in rec.skipped:
        res.leads.append({"record": rec.name, "lead": name, "source_name": name, "used": False,
                          "reason": why, "in_axis": False})


def _no_usable_lead(st: _State) -> RecordResult:
    res, rec, n_ax = st.res, st.rec, len(st.axis)
    res.status = "no_usable_lead"
    res.error = f"file {rec.path}: no usable ECG lead: " + "; ".join(
        f"{rec.leads[j]}: {st.lead_reason[j]}" for j in range(len(rec.leads)))
    res.beats = empty_beats()
    res.tensor = np.zeros((0, n_ax, st.cfg.resample.n_samples))
    res.mask = np.zeros((0, n_ax), bool)
    return res


def _cut(st: _State) -> None:
    """Beat windows of the fusion-accepted beats, cut and resampled on the axis leads."""
    cfg, rec, fused = st.cfg, st.rec, st.fused
    slot = [match_lead(a, rec.leads) for a in st.axis]  # record lead per axis slot (or None)
    st.slot_ok = np.array([s is not None and st.usable[s] for s in slot], bool)
    st.rows_src = [s if s is not None else 0 for s in slot]
    st.reasons = [[] if a else (["between_beats"] if b else ["unusable_window"] if u
                                else ["one_lead_only"])
                  for a, u, b in zip(fused.accepted, fused.unusable, fused.between)]
    st.flags = [[] for _ in range(fused.r.size)]
    acc = np.flatnonzero(fused.accepted)
    st.ra = fused.r[acc]
    start, end, why, lg = beat_windows(st.ra, rec.fs, rec.n_samples,
                                       st.gap[st.usable].any(axis=0), cfg.segment)
    st.res.logs.append(lg)
    for k, i in enumerate(acc):
        st.reasons[i] += why[k]
    if not st.slot_ok.any() or (cfg.leads.drop_incomplete_beats and not st.slot_ok.all()):
        for i in acc:
            st.reasons[i].append("lead_missing")
    # every beat with a valid window is cut (the quality scores need them)
    valid = np.array([not w for w in why], bool)
    st.vi, st.sv, st.ev = acc[valid], start[valid], end[valid]
    st.beats_mv, lg = cut_and_resample(st.y[st.rows_src], st.sv, st.ev, cfg.resample.n_samples,
                                       rec.fs)
    st.res.logs.append(lg)
    n_ax = len(st.axis)
    rv = fused.r[st.vi]
    st.g_slot = np.full((rv.size, n_ax), 2, np.int8)
    st.rhythm_slot = np.zeros((rv.size, n_ax), bool)
    st.shape_slot = np.zeros((rv.size, n_ax), bool)
    for k, src in enumerate(st.rows_src):
        if st.slot_ok[k]:
            st.g_slot[:, k] = _grade_at(st, src, rv)
            st.rhythm_slot[:, k] = _grade_at(st, src, rv, st.rhythm)
            st.shape_slot[:, k] = _grade_at(st, src, rv, st.one_shape)


def _mask(st: _State) -> None:
    """Which axis leads each beat keeps: not where unusable, annotated noisy or (when another
    lead is sound there) flat or clipped; masked slots are zero-filled."""
    cfg, rec = st.cfg, st.rec
    mask = st.slot_ok[None, :] & (st.g_slot < 2)
    st.annotated = np.zeros(st.vi.size, bool)
    if cfg.labels.exclude_annotated_noise and rec.annotations is not None and st.vi.size:
        channels = rec.channels or list(range(len(rec.leads)))
        noisy_ann = noise_stretches(rec.annotations, rec.n_samples, channels)
        if noisy_ann.any():
            ann = (window_fraction(noisy_ann[st.rows_src], st.sv, st.ev) > 0) & mask
            st.annotated = mask.any(axis=1) & ~(mask & ~ann).any(axis=1)
            mask &= ~ann
    # a large ectopic beat at the converter's rail in one lead keeps its other leads; with no
    # sound lead left the beat is excluded (flat_or_clipped)
    if st.vi.size:
        faulty = (window_fraction(st.bad[st.rows_src], st.sv, st.ev) >
                  cfg.quality.max_bad_fraction_in_beat) & mask
        spare = (mask & ~faulty).any(axis=1)
        mask &= ~(faulty & spare[:, None])
    st.beats_mv[~mask] = 0.0
    st.mask = mask


def _score(st: _State) -> None:
    """The evidence the quality rules read, and the score columns of the beat table."""
    cfg, fs, fused, vi = st.cfg, st.rec.fs, st.fused, st.vi
    r, n = fused.r, fused.r.size
    q = cfg.quality
    agree = (detector_agreement(r, st.other, st.usable, fs) if cfg.windows.enabled
             else np.ones(n, bool))
    n_seen = fused.support.sum(axis=1)
    weak = (n_seen < int(st.usable.sum())) | (fused.confidence < 1.0)
    rr_prev, rr_next = rr_to_beats(r[vi], st.ra, fs)
    lo, hi = np.searchsorted(st.ra, st.sv, "left"), np.searchsorted(st.ra, st.ev, "left")
    if vi.size:
        hf, _ = high_freq(st.notched[st.rows_src], fs)
        cut = cut_beat_scores(st.beats_mv, st.mask, hf, st.bad[st.rows_src], st.sv, st.ev,
                              q.template_beats)
    else:
        cut = {k: np.zeros(0) for k in ("template_corr", "hf_ratio", "bad_fraction",
                                        "amplitude_z")}
    qm, st.n_library = _qrs_match(st, r[vi])
    n_here = np.zeros(vi.size, np.int64)
    for j in np.flatnonzero(st.usable):
        n_here += _grade_at(st, j, r[vi]) < 2
    rr_clean = clean_median_rr(st.g_slot, st.mask, rr_prev)
    with np.errstate(invalid="ignore"):  # the timing of an extra complex (as between_beats)
        one_cycle = rr_prev + rr_next < PRUNE_RR * rr_clean
    st.evidence = BeatEvidence(
        mask=st.mask, grade=st.g_slot, slot_ok=st.slot_ok, annotated_noise=st.annotated,
        qrs_match=qm, second_detector=agree[vi], weak=weak[vi], n_seen=n_seen[vi],
        n_here=n_here, lone=(n_here <= 1) & (int(st.usable.sum()) >= 2),
        noisy_lead=((st.g_slot >= 1) & st.mask).any(axis=1),
        rhythm=(st.rhythm_slot & st.mask).any(axis=1), rr_prev=rr_prev, rr_next=rr_next,
        overlap=(hi - lo) > 1, rr_clean=rr_clean, one_cycle=one_cycle,
        one_shape=st.shape_slot, **cut)
    st.scores = {}  # beat-table columns over every row, NaN / '' where a row has no window
    for k in ("template_corr", "hf_ratio", "bad_fraction", "amplitude_z"):
        st.scores[k] = np.full(n, np.nan)
        st.scores[k][vi] = cut[k]
    st.scores["window_grade"] = np.full(n, "", dtype=object)
    st.scores["second_detector"] = agree
    st.scores["qrs_match"] = np.full(n, np.nan)
    st.scores["qrs_match"][vi] = qm


def _qrs_match(st: _State, rv: np.ndarray) -> tuple[np.ndarray, int]:
    """qrs_match of the cut beats, and how many clean beats it compared against: cut beats
    whose every usable lead is graded good with its window's beats agreeing with their average
    (the grade holds no rhythm test, so a stretch of bigeminy gives its ectopic beats to the
    library)."""
    q = st.cfg.quality
    if rv.size == 0:
        return np.zeros(0), 0
    leads = range(len(st.grades))
    g = np.stack([_grade_at(st, j, rv) for j in leads], axis=1)
    lead_ok = st.usable[None, :] & (g < 2)
    lib = np.stack([(_grade_at(st, j, rv) == 0) & _grade_at(st, j, rv, st.one_shape)
                    for j in leads], axis=1)
    clean = lib | ~st.usable[None, :]
    library = rv[clean.all(axis=1) & lead_ok.any(axis=1)]
    return (qrs_match(st.y, rv, lead_ok, library, st.rec.fs, q.qrs_half_ms, q.qrs_match_k,
                      q.qrs_library_beats), int(min(library.size, q.qrs_library_beats)))


def _decide(st: _State) -> None:
    """Reason codes and flags of the cut beats, merged into every row's, and the log."""
    reasons, flags, grade = decide(st.evidence, st.cfg.quality, st.cfg.windows)
    for k, i in enumerate(st.vi):
        st.reasons[i] += reasons[k]
        st.flags[i] += flags[k]
    st.scores["window_grade"][st.vi] = grade
    st.res.logs.append(quality_log(st.cfg.quality, st.n_library, st.reasons))


def record_result(rec_loader: Callable[[], Record], name: str, cfg: Config,
                  axis: list[str], mapping: dict[str, str] | None = None) -> RecordResult:
    """Read and process one record; any failure becomes a ``failed`` result with a message."""
    try:
        rec = rec_loader()
        return beats_of_record(rec, cfg, axis, mapping)
    except BeatmillError as exc:
        return RecordResult(name, "failed", error=str(exc))
    except MemoryError:
        return RecordResult(name, "failed", error="out of memory while processing; process the "
                                                  "record alone or with fewer workers")
    except Exception as exc:  # a bug or an unforeseen input: the batch goes on, the log keeps it
        log.debug("unexpected error in %s:\n%s", name, traceback.format_exc())
        return RecordResult(name, "failed", error=f"unexpected {type(exc).__name__}: {exc} "
                                                  "(please report this with the record)")
