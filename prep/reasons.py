"""Reason codes (why a beat was excluded) and flags (warnings on kept beats).

Codes are short, stable and ours. Each has a one-line explanation; ``beatmill reasons`` prints them.
"""
from __future__ import annotations

REASONS: dict[str, tuple[str, str]] = {
    # code: (stage that sets it, explanation)
    "one_lead_only": ("rpeaks", "seen by a minority of the used leads, none of them locally "
                                "trusted at that time (docs/rpeaks.md, fusion)"),
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
    "lead_missing": ("segment", "a lead of the axis is missing or rejected and "
                                "leads.drop_incomplete_beats is on"),
}

FLAGS: dict[str, str] = {
    "unlike_neighbours": "kept, but correlation with the running median beat is below "
                         "quality.flag_template_corr (often an ectopic beat)",
    "partial_leads": "kept with some leads zero-filled (lead_mask False)",
}


def join(codes) -> str:
    """';'-join codes in a stable order (the order of the tables above), without repeats."""
    order = list(REASONS) + [f for f in FLAGS if f not in REASONS]
    uniq = set(codes)
    return ";".join(c for c in order if c in uniq)
