"""EDF and EDF+ records (the open standard of most wearables and sleep labs).

EDF and EDF+C samples and annotations come from ``pyedflib`` (a well-kept reader). Known
readers treat EDF+D (discontinuous) files as contiguous, or, like pyedflib, refuse them; this
module reads EDF+D itself from the specification (Kemp & Olivan 2003): the header, the int16 data
records scaled by each signal's physical and digital range, and the time-keeping TAL
("+onset\\x14\\x14\\x00") that opens every data record's annotation signal. Each data record's
samples are placed at its onset, so jumps become gaps (NaN), never joined signal.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from prep.config import ReadConfig
from prep.errors import RecordError
from prep.io._files import Format, annotation_csv, check_rate, hashed, sha256_file
from prep.leads import canonical_lead, classify_channel, scale_to_mv
from prep.model import Annotations, Record


def _header(path: Path) -> dict:
    with open(path, "rb") as fh:
        head = fh.read(256)
        if len(head) < 256:
            raise RecordError("file is shorter than an EDF header", path=str(path), stage="read")
        try:
            ns = int(head[252:256].decode("ascii").strip())
            n_rec = int(head[236:244].decode("ascii").strip())
            dur = float(head[244:252].decode("ascii").strip())
        except ValueError:
            raise RecordError("not an EDF header (counts are not numbers)", path=str(path),
                              stage="read") from None
        if not 0 < ns < 4096:
            raise RecordError(f"EDF header declares {ns} signals", path=str(path), stage="read")
        if not dur > 0:
            raise RecordError(f"EDF header gives data records of {dur:g} s; the duration of a "
                              "data record must be positive (bytes 244-251 of the header)",
                              path=str(path), stage="read")
        sh = fh.read(256 * ns)
    def field(offset, width):
        return [sh[offset + i * width: offset + (i + 1) * width].decode("latin-1").strip()
                for i in range(ns)]
    o = 0
    labels = field(o, 16); o += 16 * ns
    o += 80 * ns  # transducer
    dims = field(o, 8); o += 8 * ns
    pmin = [float(v or 0) for v in field(o, 8)]; o += 8 * ns
    pmax = [float(v or 0) for v in field(o, 8)]; o += 8 * ns
    dmin = [float(v or 0) for v in field(o, 8)]; o += 8 * ns
    dmax = [float(v or 0) for v in field(o, 8)]; o += 8 * ns
    o += 80 * ns  # prefiltering
    spr = [int(v or 0) for v in field(o, 8)]
    return {"reserved": head[192:236].decode("latin-1").strip(), "n_records": n_rec,
            "record_s": dur, "labels": labels, "dims": dims, "spr": spr, "pmin": pmin,
            "pmax": pmax, "dmin": dmin, "dmax": dmax,
            "header_bytes": 256 * (ns + 1)}


def parse_tals(block: bytes) -> list[tuple[float, float, list[str]]]:
    r"""Time-stamped annotation lists of one data record: (onset s, duration s, texts).

    >>> parse_tals(b"+12.5\x14\x14\x00+13\x150.2\x14N\x14\x00\x00")
    [(12.5, 0.0, ['']), (13.0, 0.2, ['N'])]
    """
    out = []
    for tal in block.split(b"\x00"):
        if not tal:
            continue
        parts = tal.split(b"\x14")
        head = parts[0].split(b"\x15")
        try:
            onset = float(head[0].decode("ascii"))
            dur = float(head[1].decode("ascii")) if len(head) > 1 and head[1] else 0.0
        except (ValueError, UnicodeDecodeError):
            continue
        texts = [t.decode("utf-8", "replace") for t in parts[1:-1]] or [""]
        out.append((onset, dur, texts))
    return out


def _read_discontinuous(path: Path, h: dict):
    """EDF+D by the specification: samples of every data record placed at its onset."""
    ns = len(h["labels"])
    spr = h["spr"]
    per_rec = sum(spr)
    raw = np.fromfile(path, dtype="<i2", offset=h["header_bytes"])
    n_rec = min(h["n_records"], raw.size // per_rec)
    raw = raw[: n_rec * per_rec].reshape(n_rec, per_rec)
    offs = np.r_[0, np.cumsum(spr)]
    ann_idx = [i for i in range(ns) if h["labels"][i] == "EDF Annotations"]
    onsets = np.empty(n_rec)
    annotations = []
    for k in range(n_rec):  # one step per data record
        if not ann_idx:
            onsets[k] = k * h["record_s"]
            continue
        a = ann_idx[0]
        tals = parse_tals(raw[k, offs[a]:offs[a + 1]].tobytes())
        if not tals:
            raise RecordError(f"data record {k} has no time-keeping annotation; the file is not "
                              "valid EDF+", path=str(path), stage="read")
        onsets[k] = tals[0][0]
        annotations += [(o, d, t) for o, d, texts in tals[1:] for t in texts if t]
    signals = {}
    for i in range(ns):
        if i in ann_idx:
            continue
        d = raw[:, offs[i]:offs[i + 1]].astype(np.float64)
        span = (h["dmax"][i] - h["dmin"][i]) or 1.0
        signals[i] = (d - h["dmin"][i]) * (h["pmax"][i] - h["pmin"][i]) / span + h["pmin"][i]
    return onsets, signals, annotations


def read_edf(path: str | Path, *, name: str | None = None, inputs=None, sampfrom: int = 0,
             sampto: int | None = None) -> Record:
    """Read the ECG channels of an EDF/EDF+ file in mV; EDF+D jumps become gaps.

    ``sampfrom``/``sampto`` read one stretch of an EDF or EDF+C file (annotation samples then
    count from ``sampfrom``); an EDF+D file is always read whole."""
    path = Path(path)
    h = _header(path)
    if h["reserved"].startswith("EDF+D"):
        if sampfrom or sampto:
            raise ValueError("EDF+D files are read whole")
        return _edf_discontinuous(path, h, name, inputs)
    return _edf_contiguous(path, h, name, inputs, sampfrom, sampto)


def contiguous_length(path: str | Path) -> tuple[int, float]:
    """(samples, rate) of the ECG channels of an EDF/EDF+C file from its header; (0, 0.0) for
    EDF+D, whose length in samples depends on its record onsets."""
    h = _header(Path(path))
    if h["reserved"].startswith("EDF+D") or h["n_records"] <= 0 or h["record_s"] <= 0:
        return 0, 0.0
    rates = [s / h["record_s"] for s in h["spr"]]
    keep, _, fs = _pick_channels(h["labels"], rates, h["dims"], str(path))
    return int(h["n_records"] * h["spr"][keep[0]]), float(fs)


def _pick_channels(labels, rates, dims, shown):
    ecg, skipped = [], []
    for i, lab in enumerate(labels):
        if lab == "EDF Annotations":
            continue
        ok, why = classify_channel(lab, dims[i])
        (ecg.append(i) if ok else skipped.append((lab, why)))
    if not ecg:
        raise RecordError("no ECG channel (all channels skipped: " +
                          "; ".join(w for _, w in skipped) + ")", path=shown, stage="read")
    fs = max(rates[i] for i in ecg)
    check_rate(fs, shown)
    keep = [i for i in ecg if rates[i] == fs]
    skipped += [(labels[i], f"channel '{labels[i]}' is sampled at {rates[i]:g} Hz, not the ECG "
                            f"rate {fs:g} Hz") for i in ecg if rates[i] != fs]
    return keep, skipped, fs


def _edf_discontinuous(path: Path, h: dict, name, inputs) -> Record:
    shown = str(path)
    rates = [s / h["record_s"] if h["record_s"] else 0.0 for s in h["spr"]]
    keep, skipped, fs = _pick_channels(h["labels"], rates, h["dims"], shown)
    onsets, signals, anns = _read_discontinuous(path, h)
    spr = h["spr"][keep[0]]
    start = np.round((onsets - onsets[0]) * fs).astype(np.int64)
    if (np.diff(start) < spr).any():
        raise RecordError("EDF+D data records overlap in time (onsets closer than a record); "
                          "the file is not valid", path=shown, stage="read")
    total = int(start[-1] + spr)
    data = np.full((len(keep), total), np.nan)
    for j, i in enumerate(keep):
        rows = signals[i] * scale_to_mv(h["dims"][i])
        idx = (start[:, None] + np.arange(spr)[None, :]).ravel()
        data[j, idx] = rows.ravel()
    gaps = int(np.isnan(data[0]).sum())
    ann = None
    if anns:
        samp = np.round((np.array([a[0] for a in anns]) - onsets[0]) * fs).astype(np.int64)
        sym = np.array([a[2].strip() for a in anns], dtype=object)
        inside = (samp >= 0) & (samp < total)
        ann = Annotations(samp[inside], sym[inside], aux=np.full(int(inside.sum()), "", object),
                          source=path.name)
    return Record(name=name or path.stem, fs=fs, signals=data,
                  lead_names=[h["labels"][i] for i in keep],
                  leads=[canonical_lead(h["labels"][i]) for i in keep], units=["mV"] * len(keep),
                  inputs=inputs or [(path.name, sha256_file(path))], skipped=skipped,
                  annotations=ann, path=shown, channels=keep,
                  warnings=[f"EDF+D: {len(onsets)} data records, {gaps} samples of gaps between "
                            "them kept as gaps"])


def _edf_contiguous(path: Path, h: dict, name, inputs, sampfrom: int = 0,
                    sampto: int | None = None) -> Record:
    import pyedflib

    shown = str(path)
    try:
        f = pyedflib.EdfReader(str(path))
    except OSError as exc:
        raise RecordError(f"the EDF reader refuses the file ({exc}); check it with an EDF "
                          "validator", path=shown, stage="read") from None
    try:
        n = f.signals_in_file
        labels = f.getSignalLabels()
        rates = [float(f.getSampleFrequency(i)) for i in range(n)]
        dims = [f.getPhysicalDimension(i) for i in range(n)]
        keep, skipped, fs = _pick_channels(labels, rates, dims, shown)
        total = int(f.getNSamples()[keep[0]])
        lo = int(sampfrom)
        hi = total if sampto is None else min(total, int(sampto))
        data = np.vstack([f.readSignal(i, start=lo, n=max(0, hi - lo)) * scale_to_mv(dims[i])
                          for i in keep])
        onsets_a, durs, texts = f.readAnnotations()
    finally:
        f.close()
    t0 = lo / fs
    ann = None
    if len(texts):
        samp = np.round((np.asarray(onsets_a, float) - t0) * fs).astype(np.int64)
        sym = np.array([str(t).strip() for t in texts], dtype=object)
        inside = (samp >= 0) & (samp < data.shape[1])
        ann = Annotations(samp[inside], sym[inside], aux=np.full(int(inside.sum()), "", object),
                          source=path.name)
    warnings: list[str] = []
    return Record(name=name or path.stem, fs=fs, signals=data,
                  lead_names=[labels[i] for i in keep], leads=[canonical_lead(labels[i]) for i in keep],
                  units=["mV"] * len(keep), inputs=inputs or [(path.name, sha256_file(path))],
                  skipped=skipped, annotations=ann, path=shown, channels=keep, warnings=warnings)


def record_files(path: Path, cfg: ReadConfig) -> list[Path]:
    """The EDF file and its annotation CSV, if present."""
    ann = annotation_csv(path.with_suffix(""))
    return [path] + ([ann] if ann.exists() else [])


def _read(path: Path, cfg: ReadConfig, *, name, inputs, sampfrom: int = 0,
          sampto: int | None = None) -> Record:
    ranged = {"sampfrom": sampfrom, "sampto": sampto} if (sampfrom or sampto) else {}
    return read_edf(path, name=name, inputs=inputs or hashed(record_files(path, cfg)), **ranged)


def _leads(path: Path, cfg: ReadConfig) -> list[str]:
    return read_edf(path).leads


FORMAT = Format(kind="edf", suffixes=(".edf", ".bdf"), read=_read, files=record_files,
                length=contiguous_length, leads=_leads)
