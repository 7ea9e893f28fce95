"""The last step of one record: tensor rows of the kept beats, which rows are heartbeats, RR
between heartbeats, reference labels and the beat table; and the lead table's rows."""
from __future__ import annotations

import numpy as np
import pandas as pd

from prep.leads import match_lead
from prep.model import BEAT_SYMBOLS, Record
from prep.pipeline.rr import UNCONFIRMED, rr_to_beats, unknown_across
from prep.quality import reasons as R
from prep.quality.windows import main_fault
from prep.stages.labels import attach_labels, beat_classes, class_yield, rhythm_at, unknown_symbols


def tabulate(st, mapping: dict[str, str] | None) -> None:
    """Tensor rows of the kept beats, heartbeats and their RR, labels, the beat table."""
    rec, cfg, res, fused = st.rec, st.cfg, st.res, st.fused
    r, n, fs = fused.r, fused.r.size, rec.fs
    included = np.array([not x for x in st.reasons], bool)
    tensor_index = np.full(n, -1, np.int64)
    tensor_index[included] = np.arange(int(included.sum()))
    pos = np.full(n, -1, np.int64)
    pos[st.vi] = np.arange(st.vi.size)
    res.tensor = st.beats_mv[pos[included]].astype(np.float32)  # as stored in shards
    res.mask = st.mask[pos[included]]
    # heartbeats: every row but detections judged not to be one; RR runs between heartbeats only
    is_beat = np.array([not any(R.group(c) == R.NOT_A_BEAT for c in x) for x in st.reasons],
                       bool)
    rr_prev, rr_next = rr_to_beats(r, r[is_beat], fs)
    # a detection that could not be confirmed in noise may have been a heartbeat: where one lies
    # between a row and its neighbouring heartbeat, that RR is unknown (NaN), not a guess
    unsure = np.array([any(c in UNCONFIRMED for c in x) for x in st.reasons], bool)
    rr_prev, rr_next = unknown_across(r, r[unsure & ~is_beat], rr_prev, rr_next, fs)
    labels = _labels(st, mapping)
    res.class_yield = class_yield(r, included, rec.annotations, fs, cfg.labels.window_ms, mapping)
    res.beats = pd.DataFrame({
        "beat_id": [f"{rec.name}:{int(s)}" for s in r], "record": rec.name,
        "r_sample": r.astype(np.int64), "r_time_s": r / fs, "rr_prev_s": rr_prev,
        "rr_next_s": rr_next, "included": included, "is_beat": is_beat,
        "reasons": [R.join(x) for x in st.reasons], "tensor_index": tensor_index,
        "beat_flags": [R.join(x) if inc else "" for x, inc in zip(st.flags, included)],
        "label": labels.astype(str), "beat_class": beat_classes(labels, mapping).astype(str),
        "rhythm": rhythm_at(r, rec.annotations).astype(str),
        "detect_conf": np.round(fused.confidence, 6),
        "n_leads_seen": fused.support.sum(axis=1).astype(np.int64),
        **{k: (np.round(v, 6) if v.dtype.kind == "f" else v) for k, v in st.scores.items()}})


def _labels(st, mapping: dict[str, str] | None) -> np.ndarray:
    """Reference labels of every row; none (with a warning) when they do not fit the signal.
    Annotation labels no class table knows are named in a warning with their counts."""
    rec, cfg, fused = st.rec, st.cfg, st.fused
    labels = attach_labels(fused.r, rec.annotations, rec.fs, cfg.labels.window_ms,
                           extra_symbols=tuple(mapping or {}))
    unknown = unknown_symbols(rec.annotations, mapping)
    if unknown:
        shown = ", ".join(f"{s!r} x{n}" for s, n in sorted(unknown.items(), key=lambda kv: -kv[1])[:8])
        st.res.warnings.append(f"reference annotations ({rec.annotations.source}) hold labels no "
                               f"class table knows, left out (their beats are unlabeled): {shown}; "
                               "name them in labels.mapping_file")
    if rec.annotations is not None and st.ra.size >= 20:
        n_ann = int(np.isin(rec.annotations.symbol, list(BEAT_SYMBOLS)).sum())
        hit = float((labels[fused.accepted] != "").mean())
        if n_ann >= 20 and hit < 0.5:
            st.res.warnings.append(f"reference annotations ({rec.annotations.source}) do not fit "
                                   f"this signal: only {hit:.0%} of detected beats have one "
                                   f"within {cfg.labels.window_ms:g} ms; labels not attached "
                                   "(is the file for another record?)")
            labels = np.full(fused.r.size, "", dtype=object)
    return labels


def lead_row(rec: Record, j: int, used: bool, reason: str, axis: list[str], fault: dict,
              w: dict) -> dict:
    """One row of the lead table; ``w``: the lead's window columns."""
    grade = np.asarray(w["grade"], dtype=object)
    counts = {g: int((grade == g).sum()) for g in ("good", "noisy", "unusable")}
    return {"record": rec.name, "lead": rec.leads[j], "source_name": rec.lead_names[j],
            "used": bool(used), "reason": reason,
            "in_axis": match_lead(rec.leads[j], axis) is not None, **fault,
            "windows_good": counts["good"], "windows_noisy": counts["noisy"],
            "windows_unusable": counts["unusable"],
            "usable_share": float((grade != "unusable").mean()) if grade.size else 0.0,
            "main_fault": main_fault(w)}
