"""Reason codes (why a beat was excluded) and flags (warnings on kept beats).

Codes are short, stable and ours. Each has a one-line explanation; ``beatmill reasons`` prints them.
"""
from __future__ import annotations

REASONS: dict[str, tuple[str, str]] = {
    # code: (stage that sets it, explanation)
    "one_lead_only": ("rpeaks", "seen by a minority of the used leads and not accepted: a lead "
                                "clean there holds no QRS energy at that time, or no lead that "
                                "saw it is clean there with a typical beat's energy or trusted "
                                "(docs/rpeaks.md, fusion)"),
    "between_beats": ("rpeaks", "not clean and strong where it was seen, and its two neighbours "
                                "make one normal cardiac cycle together (no more than 1.4 x the "
                                "local median RR apart): an extra complex, not a heartbeat "
                                "(docs/quality.md)"),
    "unusable_window": ("windows", "every used lead is graded unusable at this beat (or the beat was "
                                   "seen only in unusable stretches)"),
    "noisy_window": ("windows", "a used lead is graded noisy at this beat and windows.exclude_noisy "
                                "is on"),
    "weak_in_noise": ("quality", "in a noisy window and not confirmed: missed by a lead usable "
                                 "there, or alone in a noisy lead, without the QRS match to the "
                                 "record's clean beats that quality.missed_min_qrs_match / "
                                 "lone_lead_min_qrs_match ask for (docs/quality.md)"),
    "unmatched_in_noise": ("quality", "in a noisy window, its QRS (all usable leads together) "
                                      "correlates at least quality.noise_min_qrs_match with fewer "
                                      "than quality.qrs_match_k of the record's clean beats (every "
                                      "usable lead graded good by the noise tests there), and no "
                                      "clean lead confirms it (quality.clean_lead_confirms)"),
    "off_edge": ("segment", "the beat window runs past the start or end of the record"),
    "in_gap": ("segment", "the beat window overlaps missing samples (a gap)"),
    "no_rr": ("segment", "mode 'rr' needs both neighbouring beats, and one is missing"),
    "flat_or_clipped": ("quality", "more than quality.max_bad_fraction_in_beat of the window is flat "
                                   "or clipped in a used lead"),
    "high_freq_noise": ("quality", "high-frequency residual above quality.max_hf_ratio of the beat's "
                                   "amplitude"),
    "unlike_neighbours": ("quality", "correlation with the running median beat below "
                                     "quality.exclude_template_corr"),
    "annotated_noise": ("labels", "inside a stretch the reference annotator marked noisy or "
                                  "unreadable in a used lead (WFDB '~' annotations)"),
    "not_train_class": ("split", "a training patient's beat whose class is not in "
                                 "labels.train_classes (never moved to another split)"),
    "not_in_split_lists": ("split", "fixed split lists are given and the beat's patient is in none"),
    "amplitude_outlier": ("quality", "robust z-score of the log peak-to-peak amplitude above "
                                     "quality.max_amplitude_z"),
    "detector_disagreement": ("quality", "neurokit2's detector finds no beat within 150 ms in any "
                                         "used lead, and the beat is weak (missed by a used lead, "
                                         "or below a typical beat's envelope)"),
    "rr_too_short": ("quality", "closer than quality.min_rr_s to the previous beat (refractory)"),
    "long_pause": ("quality", "next to an RR longer than quality.long_pause_s and "
                              "quality.exclude_long_pause is on"),
    "overlaps_neighbour": ("quality", "the window holds a neighbour's R and "
                                      "quality.exclude_overlapping is on"),
    "lead_missing": ("segment", "a lead of the axis is missing or rejected and "
                                "leads.drop_incomplete_beats is on"),
}

FLAGS: dict[str, str] = {
    "unlike_neighbours": "kept, but correlation with the running median beat is below "
                         "quality.flag_template_corr (often an ectopic beat)",
    "partial_leads": "kept with some leads zero-filled (lead_mask False: missing, rejected or "
                     "unusable there)",
    "noisy_window": "a used lead is graded noisy at this beat",
    "detector_disagreement": "neurokit2's detector misses this beat, but every used lead saw it "
                             "with a typical or stronger envelope (often a wide ectopic beat)",
    "long_pause": "next to an RR longer than quality.long_pause_s",
    "unusual_rhythm": "a lead it keeps has a rhythm finding in its window (irregular RR, a long "
                      "RR or a rate outside windows.hr_range_bpm; see rhythm_findings in "
                      "windows.parquet): reported, never a reason to exclude",
    "overlaps_neighbour": "the window holds a neighbour's R (fast rhythm or a close ectopic beat)",
}


#: what an excluded row is: ``not_a_beat`` (a detection judged not to be a heartbeat: it does not
#: take part in RR intervals, heart rate or any rhythm figure; ``is_beat`` False), ``beat``
#: (a real heartbeat dropped for the quality of its signal or window) or ``split`` (a heartbeat
#: left out by the split rules).
NOT_A_BEAT = "not_a_beat"
GROUPS: dict[str, str] = {
    **dict.fromkeys(["between_beats", "one_lead_only", "unusable_window", "weak_in_noise",
                     "unmatched_in_noise", "detector_disagreement"], NOT_A_BEAT),
    **dict.fromkeys(["not_train_class", "not_in_split_lists"], "split"),
}


def group(code: str) -> str:
    """The group of a reason code (see :data:`GROUPS`; every other code is ``beat``).

    >>> group("one_lead_only"), group("off_edge")
    ('not_a_beat', 'beat')
    """
    return GROUPS.get(code, "beat")


#: the order codes are joined in: the order of the tables above
_ORDER = {c: i for i, c in enumerate(list(REASONS) + [f for f in FLAGS if f not in REASONS])}


def join(codes) -> str:
    """';'-join codes in a stable order (the order of the tables above), without repeats.

    >>> join(["noisy_window", "annotated_noise", "noisy_window"])
    'noisy_window;annotated_noise'
    """
    if not codes:
        return ""
    return ";".join(sorted({c for c in codes if c in _ORDER}, key=_ORDER.__getitem__))
