"""Long records in overlapping chunks: bounded memory for 24-hour recordings.

A WFDB or EDF/EDF+C record longer than ``chunks.chunk_minutes`` is read and processed one stretch
at a time, with ``chunks.overlap_s`` of extra signal on each side; only the beats and windows
whose start lies in the chunk's own stretch are kept, and the pieces are joined. Chunk edges are
whole quality windows, so window grades line up with an unchunked run. What differs from an
unchunked run is what each chunk decides for itself: the mains frequency, the primary lead of
fusion, lead rejection and the amplitude reference of ``amplitude_z`` are per chunk (one hour by
default).
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd

from prep.config import Config
from prep.io.sources import Source, read_source, record_length, source_inputs
from prep.model import StageLog
from prep.pipeline.record import record_result
from prep.pipeline.result import RecordResult
from prep.quality.windows import main_fault
from prep.schema import empty_beats


def chunk_plan(n: int, fs: float, cfg: Config) -> list[tuple[int, int, int, int]]:
    """(read_from, core_from, core_to, read_to) for each chunk; one chunk when short enough."""
    L = int(round(cfg.windows.window_s * fs))
    chunk = max(1, int(round(cfg.chunks.chunk_minutes * 60 * fs / L))) * L
    ov = int(math.ceil(cfg.chunks.overlap_s * fs / L)) * L
    if n <= chunk + ov:
        return [(0, 0, n, n)]
    return [(max(0, a - ov), a, min(n, a + chunk), min(n, a + chunk + ov))
            for a in range(0, n, chunk)]


#: called as ``on_chunk(record, done, total)`` after each chunk of a long record, in the
#: process that processes it (a front end sets it to show progress within one long record;
#: forked workers inherit it)
on_chunk = None


def beats_of_source(src: Source, cfg: Config, axis: list[str], mapping=None,
                    inputs=None) -> RecordResult:
    """Read and process one source, in chunks when it is a long WFDB or EDF/EDF+C record
    (CSV and EDF+D records are read whole). ``inputs``: the
    source's file checksums when the caller has them (files are then not hashed again)."""
    n, fs = record_length(src)
    plan = chunk_plan(n, fs, cfg) if n and fs > 0 else [(0, 0, 0, 0)]
    if len(plan) == 1:
        return record_result(lambda: read_source(src, cfg.read, inputs), src.name, cfg, axis,
                             mapping)
    parts = []
    inputs = inputs or source_inputs(src, cfg.read)  # hashed once, not once per chunk
    for k, (lo, a, b, hi) in enumerate(plan):  # one step per chunk
        res = record_result(lambda: _from(read_source(src, cfg.read, inputs, sampfrom=lo,
                                                      sampto=hi), lo),
                            src.name, cfg, axis, mapping)
        if res.status == "failed":
            return RecordResult(src.name, "failed", error=f"chunk {a}-{b}: {res.error}")
        parts.append((lo, a, b, _core(lo, a, b, res)))  # drop the overlap at once: bounded memory
        if on_chunk is not None:
            on_chunk(src.name, k + 1, len(plan))
    return merge_chunks(src, parts, n, fs, cfg)


def _from(rec, lo: int):
    """The chunk's record, told where it starts in the source (the baseline medians take their
    samples by source sample number)."""
    rec.first_sample = lo
    return rec


def _core(lo: int, a: int, b: int, res: RecordResult) -> RecordResult:
    """The part of a chunk's result inside its own stretch [a, b), in record sample numbers."""
    if res.windows is not None:
        w = res.windows.copy()
        w["start"] += lo
        w["end"] += lo
        res.windows = w[(w.start >= a) & (w.start < b)].reset_index(drop=True)
    if res.beats is not None and not res.beats.empty:
        bt = res.beats.copy()
        bt["r_sample"] += lo
        bt = bt[((bt.r_sample >= a) & (bt.r_sample < b)).to_numpy()].reset_index(drop=True)
        take = bt.loc[bt.included, "tensor_index"].to_numpy()
        res.tensor = np.ascontiguousarray(np.asarray(res.tensor)[take])
        res.mask = np.asarray(res.mask)[take]
        bt.loc[bt.included, "tensor_index"] = np.arange(take.size)
        res.beats = bt
    return res


def merge_chunks(src: Source, parts, n: int, fs: float, cfg: Config) -> RecordResult:
    """Join chunk results: the core beats and windows of each, renumbered; lead rows combined."""
    first = parts[0][3]
    out = RecordResult(src.name, "ok", fs=fs, duration_s=n / fs, n_leads=first.n_leads,
                       inputs=first.inputs, comments=first.comments)
    beats, tensors, masks, wins = [], [], [], []
    for lo, a, b, res in parts:  # each already cut to its core by _core
        out.warnings += [w for w in res.warnings if w not in out.warnings]
        if res.windows is not None:
            wins.append(res.windows)
        if res.beats is None or res.beats.empty:
            continue
        tensors.append(res.tensor)
        masks.append(np.asarray(res.mask))
        beats.append(res.beats)
    b = pd.concat(beats, ignore_index=True) if beats else empty_beats()
    b["r_time_s"] = b["r_sample"] / fs
    b["beat_id"] = [f"{src.name}:{int(s)}" for s in b["r_sample"]]
    ti = np.full(len(b), -1, np.int64)
    ti[b["included"].to_numpy()] = np.arange(int(b["included"].sum()))
    b["tensor_index"] = ti
    out.beats = b
    n_ax = first.mask.shape[1] if first.mask is not None else 0
    n_keep = sum(t.shape[0] for t in tensors)
    out.tensor = np.empty((n_keep, n_ax, cfg.resample.n_samples), np.float32)
    at = 0
    for p in parts:  # the list below holds the only references now
        p[3].tensor = None
    for k, t in enumerate(tensors):  # fill in place, releasing each piece once copied
        out.tensor[at:at + t.shape[0]] = t
        at += t.shape[0]
        tensors[k] = None
    out.mask = np.concatenate(masks) if masks else np.zeros((0, n_ax), bool)
    out.windows = pd.concat(wins, ignore_index=True) if wins else None
    out.leads = _merge_leads([p[3].leads for p in parts], [p[2] - p[1] for p in parts],
                             out.windows)
    statuses = [p[3].status for p in parts]
    if "ok" not in statuses:
        out.status, out.error = "no_usable_lead", first.error
    out.logs = list(first.logs) + [StageLog(
        "chunks", params={"chunk_minutes": cfg.chunks.chunk_minutes,
                          "overlap_s": cfg.chunks.overlap_s},
        derived={"chunks": [[int(a), int(b_)] for _, a, b_, _ in parts],
                 "mains_hz": [next((lg.derived.get("mains_hz") for lg in p[3].logs
                                    if lg.stage == "powerline"), None) for p in parts],
                 "note": "the other stage logs are those of the first chunk"},
        counts={"chunks": len(parts)})]
    return out


def _merge_leads(lead_lists, core_lengths, windows) -> list[dict]:
    """One row per lead: used in any chunk; fault shares weighted by chunk length."""
    rows = {}
    total = float(sum(core_lengths))
    for leads, w in zip(lead_lists, core_lengths):
        for row in leads:
            key = (row["record"], row["lead"])
            r = rows.setdefault(key, {**row, "used": False})
            r["used"] = r["used"] or row["used"]
            if row["used"]:
                r["reason"] = ""
            for k in ("flat_fraction", "clipped_fraction", "missing_fraction", "usable_fraction"):
                if k in row:
                    r.setdefault(f"_{k}", 0.0)
                    r[f"_{k}"] += row[k] * w / total
    out = []
    for r in rows.values():
        for k in ("flat_fraction", "clipped_fraction", "missing_fraction", "usable_fraction"):
            if f"_{k}" in r:
                r[k] = r.pop(f"_{k}")
        if windows is not None and "windows_good" in r:
            w = windows[windows.lead == r["lead"]]
            counts = w["grade"].value_counts()
            r["windows_good"] = int(counts.get("good", 0))
            r["windows_noisy"] = int(counts.get("noisy", 0))
            r["windows_unusable"] = int(counts.get("unusable", 0))
            r["usable_share"] = float((w["grade"] != "unusable").mean()) if len(w) else 0.0
            r["main_fault"] = main_fault(w)
        out.append(r)
    return out
