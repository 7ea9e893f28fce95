"""The exclusion rules: scores and window grades in, reason codes and flags out.

Every rule reads named evidence about the cut beats (:class:`BeatEvidence`) and one threshold of
:class:`prep.config.QualityConfig` or :class:`prep.config.WindowsConfig`; docs/quality.md lists
them with their sources. The rule for all of them: an abnormal beat is never taken for noise.
Noise is judged from the signal; rhythm findings only flag (``unusual_rhythm``, ``long_pause``).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from prep.config import QualityConfig, WindowsConfig
from prep.model import StageLog

GRADE_NAMES = np.array(["good", "noisy", "unusable"], dtype=object)

#: reason codes counted in the quality stage's log
_LOGGED = ("flat_or_clipped", "high_freq_noise", "unlike_neighbours", "unmatched_in_noise",
           "weak_in_noise", "amplitude_outlier", "detector_disagreement", "unusable_window",
           "annotated_noise", "rr_too_short")


@dataclass(frozen=True)
class BeatEvidence:
    """What the rules read: one value per cut beat (per beat and axis slot for the 2-D ones)."""

    mask: np.ndarray             # (n, n_axis) the lead fills its slot for this beat
    grade: np.ndarray            # (n, n_axis) window grade of the slot's lead at R: 0/1/2
    slot_ok: np.ndarray          # (n_axis,) the record has a usable lead for the slot
    annotated_noise: np.ndarray  # every lead it keeps is inside annotator-marked noise
    template_corr: np.ndarray
    hf_ratio: np.ndarray
    bad_fraction: np.ndarray
    amplitude_z: np.ndarray
    qrs_match: np.ndarray
    second_detector: np.ndarray  # the second detector found it in a used lead
    weak: np.ndarray             # a used lead missed it, or below a typical beat's envelope
    n_seen: np.ndarray           # used leads that detected it
    n_here: np.ndarray           # used leads not graded unusable at its R
    lone: np.ndarray             # only one usable lead here in a record with two or more
    noisy_lead: np.ndarray       # a lead it keeps is graded noisy there
    rhythm: np.ndarray           # a lead it keeps has a rhythm finding in its window
    rr_prev: np.ndarray          # s, to the previous fusion-accepted beat
    rr_next: np.ndarray
    overlap: np.ndarray          # another accepted R inside its window
    rr_clean: float = float("nan")  # s, the record's median RR over beats in good windows
    one_cycle: np.ndarray | None = None  # its neighbours make one cycle together (the timing
    #                                      of an extra complex, as between_beats judges it)
    one_shape: np.ndarray | None = None  # (n, n_axis) the slot's window: its beats agree with
    #                                      their average (tsqi_average >= windows.tsqi_noisy)


def clean_median_rr(grade: np.ndarray, mask: np.ndarray, rr_prev: np.ndarray) -> float:
    """The record's median RR (s) over beats whose every kept lead is graded good (NaN when
    fewer than 10 such beats)."""
    clean = ((grade == 0) | ~mask).all(axis=1) & mask.any(axis=1) & np.isfinite(rr_prev)
    return float(np.median(rr_prev[clean])) if clean.sum() >= 10 else float("nan")


def confirmed_by_clean_lead(ev: BeatEvidence, q: QualityConfig) -> np.ndarray:
    """Beats the signal vouches for whatever their shape (``quality.clean_lead_confirms``): a
    lead graded good at the beat, in a window whose beats agree with their average (the clean
    windows that give ``qrs_match`` its library), keeps it, every usable lead there saw it, the
    second detector found it, and it sits where a heartbeat can: its two neighbours do not make
    one cycle together (``one_cycle``: no extra complex, as ``between_beats`` judges it) and
    neither is closer than ``min_rr_share_confirmed`` of the record's median clean RR."""
    n = ev.mask.shape[0]
    if not np.isfinite(ev.rr_clean) or ev.one_cycle is None:
        return np.zeros(n, bool)
    with np.errstate(invalid="ignore"):
        timing = (~ev.one_cycle & np.isfinite(ev.rr_prev + ev.rr_next)
                  & (np.minimum(ev.rr_prev, ev.rr_next) >= q.min_rr_share_confirmed * ev.rr_clean))
    good = (ev.grade == 0) & ev.mask
    if ev.one_shape is not None:  # a clean window in the library's sense (see qrs_match)
        good &= ev.one_shape
    good_lead = good.any(axis=1)
    return good_lead & (ev.n_seen >= ev.n_here) & ev.second_detector & timing


def decide(ev: BeatEvidence, q: QualityConfig, wq: WindowsConfig
           ) -> tuple[list[list[str]], list[list[str]], np.ndarray]:
    """Reasons and flags of each cut beat, and its window grade name (the worst among the
    leads it keeps; ``unusable`` when it keeps none)."""
    n, n_ax = ev.mask.shape
    reasons: list[list[str]] = [[] for _ in range(n)]
    flags: list[list[str]] = [[] for _ in range(n)]
    has = ev.mask.any(axis=1)
    noisy_w = ((ev.grade == 1) & ev.mask).any(axis=1) & has
    in_noise = ((ev.grade >= 1) | ~ev.mask).all(axis=1) & has
    tc, qm = ev.template_corr, ev.qrs_match
    # a disagreement excludes only a weakly supported beat: one that some used lead missed, whose
    # envelope is below a typical beat's, or that no good window vouches for; a strong beat seen
    # in every lead in a good window (a wide ectopic beat the peer misses) is kept with a flag
    weak = ev.weak | (((ev.grade >= 1) | ~ev.mask).all(axis=1) & has)
    # a beat in noise must be seen by every lead usable there and look like the record's clean
    # beats: a low qrs_match is unmatched_in_noise (below); where the record has too few clean
    # beats for qrs_match, the beat must be like the running template instead
    unlike = np.isnan(qm) & ~(tc >= q.noise_min_template_corr)
    missed = ev.n_seen < ev.n_here
    unconfirmed = missed | unlike
    if q.lone_lead_min_qrs_match > -1:  # no second usable lead there: a stricter match
        unconfirmed |= ev.lone & ~(qm >= q.lone_lead_min_qrs_match)
    disagree = ~ev.second_detector
    confirmed = confirmed_by_clean_lead(ev, q) if q.clean_lead_confirms else np.zeros(n, bool)
    pause = np.maximum(np.nan_to_num(ev.rr_prev), np.nan_to_num(ev.rr_next)) > q.long_pause_s
    rules = [
        (ev.annotated_noise, reasons, "annotated_noise"),
        # inside annotated noise, a beat the second detector does not confirm is not counted
        (ev.annotated_noise & disagree & q.exclude_detector_disagreement, reasons,
         "detector_disagreement"),
        (has & ((in_noise & unconfirmed) |
                (noisy_w & missed & ~(qm >= q.missed_min_qrs_match))), reasons, "weak_in_noise"),
        (has & ev.noisy_lead & (qm < q.noise_min_qrs_match) & ~confirmed, reasons,
         "unmatched_in_noise"),
        (~has & ev.slot_ok.any() & ~ev.annotated_noise, reasons, "unusable_window"),
        (noisy_w, reasons if wq.exclude_noisy else flags, "noisy_window"),
        (has & (ev.bad_fraction > q.max_bad_fraction_in_beat), reasons, "flat_or_clipped"),
        (has & (ev.hf_ratio > q.max_hf_ratio), reasons, "high_freq_noise"),
        (has & (tc < q.exclude_template_corr), reasons, "unlike_neighbours"),
        (has & (tc >= q.exclude_template_corr) & (tc < q.flag_template_corr), flags,
         "unlike_neighbours"),
        (has & (ev.amplitude_z > q.max_amplitude_z), reasons, "amplitude_outlier"),
        (has & disagree & weak & q.exclude_detector_disagreement, reasons,
         "detector_disagreement"),
        (has & disagree & ~(weak & q.exclude_detector_disagreement), flags,
         "detector_disagreement"),
        (has & (ev.mask.sum(axis=1) < n_ax), flags, "partial_leads"),
        (has & ev.rhythm, flags, "unusual_rhythm"),
        # rhythm: refractory, pauses, overlapping neighbours (over fusion-accepted beats)
        (ev.rr_prev < q.min_rr_s, reasons, "rr_too_short"),
        (pause, reasons if q.exclude_long_pause else flags, "long_pause"),
        (ev.overlap, reasons if q.exclude_overlapping else flags, "overlaps_neighbour"),
    ]
    for hit, target, code in rules:  # one step per rule, not per beat
        for k in np.flatnonzero(hit):
            target[k].append(code)
    worst = np.where(ev.mask, ev.grade, -1).max(axis=1) if n_ax else np.full(n, -1)
    grade = np.where(worst >= 0, GRADE_NAMES[np.clip(worst, 0, 2)], "unusable")
    return reasons, flags, grade


def quality_log(q: QualityConfig, n_library: int, reasons: list[list[str]]) -> StageLog:
    """The quality stage's log: its parameters, the clean-beat library size of ``qrs_match``
    and how many rows (of every row of the record) carry each quality reason."""
    return StageLog("quality", params={k: getattr(q, k) for k in q.__dataclass_fields__},
                    derived={"qrs_match_clean_beats": n_library,
                             "qrs_match": "computed" if n_library > q.qrs_match_k else
                             "too few clean beats: NaN, running-template test used"},
                    counts={c: sum(c in x for x in reasons) for c in _LOGGED})
