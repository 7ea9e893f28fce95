"""WFDB records (PhysioNet's open format): a ``.hea`` header naming signal files, read with
``wfdb``; reference annotations from the file named by ``ReadConfig.annotation_extension``.

Registered in :data:`prep.io.sources.FORMATS` by :data:`FORMAT`.
"""
from __future__ import annotations

import copy
import os
from pathlib import Path

import numpy as np

from prep.config import ReadConfig
from prep.errors import RecordError
from prep.io._files import Format, annotation_csv, check_rate, hashed
from prep.io._wfdb_header import check_header, lower_case_view, parsed_header
from prep.leads import canonical_lead, classify_channel, scale_to_mv
from prep.model import Annotations, Record


def original_header(base: Path) -> str:
    """The header file as the user named it (``REC.HEA`` where it was written so)."""
    plain = Path(str(base) + ".hea")
    if plain.exists():
        return str(plain)
    hits = [f for f in base.parent.glob(base.name + ".*") if f.suffix.lower() == ".hea"]
    return str(hits[0]) if hits else str(plain)


def record_files(base: Path, cfg: ReadConfig) -> list[Path]:
    """Every file a WFDB record is read from, without decoding it: the header, the signal files
    it names, the annotation file and an annotation CSV, those present, sorted (links of a
    case view resolved to the files they stand for)."""
    view = lower_case_view(base)
    if view != Path(base):
        return sorted({f.resolve() for f in record_files(view, cfg)})
    files = {Path(str(base) + ".hea")}
    try:
        text = Path(str(base) + ".hea").read_bytes().decode("latin-1")
        lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
        for ln in lines[1:]:
            tok = ln.split()
            if tok and tok[0] != "~":
                files.add(base.parent / tok[0])
    except OSError:
        pass
    files.add(Path(str(base) + "." + cfg.annotation_extension))
    files.add(annotation_csv(base))
    return [f for f in sorted(files) if f.is_file()]


def record_length(base: Path) -> tuple[int, float]:
    """(samples, rate) from the header; (0, 0.0) for multi-segment and several-rate records,
    which are read whole."""
    h = parsed_header(lower_case_view(base))
    several_rates = any(int(x or 1) != 1 for x in (h.samps_per_frame or []))
    if getattr(h, "n_seg", None) or several_rates:
        return 0, 0.0
    return int(h.sig_len or 0), float(h.fs or 0)


def header_leads(base: Path, cfg: ReadConfig) -> list[str]:
    """Canonical ECG leads from the header alone (a multi-segment header names no signal: then
    the record is read)."""
    base = lower_case_view(base)
    h = parsed_header(base)
    if not h.sig_name:
        return read_wfdb(base, cfg).leads
    units = h.units or [""] * len(h.sig_name)
    return [canonical_lead(n) for n, u in zip(h.sig_name, units) if classify_channel(n, u)[0]]


def segment_headers(bases: list[Path]) -> set[Path]:
    """Headers named as segments by a multi-segment master header: parts, not records."""
    out: set[Path] = set()
    for b in bases:
        try:
            lines = Path(str(b) + ".hea").read_text(errors="replace").splitlines()
        except OSError:
            continue
        body = [ln for ln in lines if ln.strip() and not ln.startswith("#")]
        if body and "/" in body[0].split()[0]:  # "name/nseg ..." marks a multi-segment header
            for ln in body[1:]:
                seg = ln.split()[0]
                if seg != "~":
                    out.add(b.parent / seg)
    return out



def read_wfdb(base: str | Path, cfg: ReadConfig = ReadConfig(), *, name: str | None = None,
              sampfrom: int = 0, sampto: int | None = None, inputs=None) -> Record:
    """Read a WFDB record in physical units (mV) with its reference annotations, if any.

    ``sampfrom``/``sampto`` read one stretch only (annotation samples then count from
    ``sampfrom``); long records are processed in such chunks. ``inputs``: the files' checksums
    when the caller has them already (they are not hashed again).
    """
    import wfdb

    base = Path(base)
    shown = str(base) + ".hea"
    warnings: list[str] = []
    spf: list[int] = []
    safe = check_header(base, shown, warnings, spf)
    if any(x != 1 for x in spf):  # several rates: read every sample of the ECG leads instead
        return _read_multirate(base, spf, cfg, name, shown, warnings, inputs)
    end = min(x for x in (safe, sampto) if x) if (safe or sampto) else None
    try:
        header = parsed_header(base)
        if isinstance(header, wfdb.Record):  # the header parsed once; the samples read as wfdb does
            rec = _read_samples(copy.deepcopy(header), base, int(sampfrom), end)
        else:
            rec = wfdb.rdrecord(str(base), physical=True, return_res=64, sampfrom=int(sampfrom),
                                **({"sampto": int(end)} if end else {}))
    except FileNotFoundError as exc:
        raise RecordError(f"a file of the record is missing ({exc.filename or exc}); restore it or "
                          "leave the record out", path=shown, stage="read") from None
    except PermissionError as exc:
        raise RecordError(f"a file of the record cannot be read (permission denied: "
                          f"{exc.filename or exc}); ask its owner for read access", path=shown,
                          stage="read") from None
    except Exception as exc:  # wfdb raises many types for malformed files
        raise RecordError(f"cannot read the WFDB record ({type(exc).__name__}: {exc}); check the "
                          "header and signal files", path=shown, stage="read") from None
    fs = float(rec.fs or 0)
    check_rate(fs, shown)
    sig = rec.p_signal
    if sig is None or sig.size == 0:
        raise RecordError("the record holds no samples", path=shown, stage="read")
    names = [str(n) for n in (rec.sig_name or [f"ch{i}" for i in range(sig.shape[1])])]
    units = [str(u or "") for u in (rec.units or [""] * len(names))]
    keep, skipped = _ecg_channels(names, units, shown)
    data = np.ascontiguousarray(sig[:, keep].T, dtype=np.float64)
    data *= np.array([scale_to_mv(units[i]) for i in keep])[:, None]
    ann = _read_wfdb_annotations(base, cfg.annotation_extension, data.shape[1], warnings,
                                 offset=sampfrom)
    inputs = inputs or hashed(record_files(base, cfg))
    bad = ~np.isfinite(data)
    if bad.any():
        warnings.append(f"{int(bad.sum())} missing or non-finite samples become gaps")
    return Record(name=name or base.name, fs=fs, signals=data, warnings=warnings,
                  lead_names=[names[i] for i in keep], leads=[canonical_lead(names[i]) for i in keep],
                  units=["mV"] * len(keep), inputs=inputs, skipped=skipped, annotations=ann,
                  comments=list(rec.comments or []), path=shown, channels=keep)


def _read_samples(record, base: Path, sampfrom: int, sampto: int | None):
    """``wfdb.rdrecord(base, physical=True, return_res=64, ...)`` of a single-segment record
    whose header is parsed already: the steps of wfdb's own single-segment path (length from
    the signal file when the header has none, its input checks, its segment reader, its field
    arrangement and physical conversion), without parsing the header again.
    tests/io/test_formats.py compares both on every record in ../shared and demo_records."""
    from wfdb.io import _signal

    dir_name = os.path.abspath(str(base.parent))
    if sampto is None:
        if record.sig_len is None:
            per_frame = sum(spf for f, spf in zip(record.file_name, record.samps_per_frame)
                            if f == record.file_name[0])
            record.sig_len = _signal._infer_sig_len(
                file_name=record.file_name[0], fmt=record.fmt[0], tsamps_per_frame=per_frame,
                byte_offset=record.byte_offset[0], dir_name=dir_name, pn_dir=None)
        sampto = record.sig_len
    channels = list(range(record.n_sig))
    record.check_read_inputs(sampfrom, sampto, channels, True, True, 64)
    record.e_d_signal = _signal._rd_segment(
        file_name=record.file_name, dir_name=dir_name, pn_dir=None, fmt=record.fmt,
        n_sig=record.n_sig, sig_len=record.sig_len, byte_offset=record.byte_offset,
        samps_per_frame=record.samps_per_frame, skew=record.skew,
        init_value=record.init_value, sampfrom=sampfrom, sampto=sampto, channels=channels,
        ignore_skew=False, no_file=False, sig_data=None, return_res=64)
    record._arrange_fields(channels=channels, sampfrom=sampfrom, smooth_frames=True)
    record.dac(expanded=False, return_res=64, inplace=True)
    return record


def _ecg_channels(names: list[str], units: list[str], shown: str):
    """Indices of the ECG channels, and (name, why) of the others; an error when none is ECG."""
    keep, skipped = [], []
    for i, (n, u) in enumerate(zip(names, units)):
        ok, why = classify_channel(n, u)
        (keep.append(i) if ok else skipped.append((n, why)))
    if not keep:
        raise RecordError("no ECG channel (all channels skipped: " +
                          "; ".join(w for _, w in skipped) + "); choose records with ECG leads",
                          path=shown, stage="read")
    return keep, skipped


def _read_multirate(base: Path, spf: list[int], cfg: ReadConfig, name, shown, warnings, inputs):
    """A record whose signals have different rates: the ECG leads at the highest ECG rate are
    read at that rate (every sample), the other channels are skipped with the reason."""
    import wfdb

    rec = wfdb.rdrecord(str(base), physical=True, smooth_frames=False, return_res=64)
    fs0 = float(rec.fs)
    names = [str(n) for n in rec.sig_name]
    units = [str(u or "") for u in rec.units]
    ecg = [i for i in range(len(names)) if classify_channel(names[i], units[i])[0]]
    skipped = [(names[i], classify_channel(names[i], units[i])[1]) for i in range(len(names))
               if i not in ecg]
    if not ecg:
        raise RecordError("no ECG channel", path=shown, stage="read")
    top = max(spf[i] for i in ecg)
    keep = [i for i in ecg if spf[i] == top]
    skipped += [(names[i], f"channel '{names[i]}' is sampled at {fs0 * spf[i]:g} Hz, not the ECG "
                           f"rate {fs0 * top:g} Hz") for i in ecg if spf[i] != top]
    data = np.vstack([np.asarray(rec.e_p_signal[i], dtype=np.float64) * scale_to_mv(units[i])
                      for i in keep])
    ann = _read_wfdb_annotations(base, cfg.annotation_extension, data.shape[1], warnings)
    if ann is not None:  # WFDB annotation times count frames; the ECG rate is top x frame rate
        ann.sample = ann.sample * top
    return Record(name=name or base.name, fs=fs0 * top, signals=data, warnings=warnings,
                  lead_names=[names[i] for i in keep], leads=[canonical_lead(names[i]) for i in keep],
                  units=["mV"] * len(keep),
                  inputs=inputs or hashed(record_files(base, cfg)),
                  skipped=skipped, annotations=ann, comments=list(rec.comments or []), path=shown,
                  channels=keep)


def _read_wfdb_annotations(base: Path, ext: str, n_samples: int, warnings: list[str],
                           offset: int = 0) -> Annotations | None:
    """The record's reference annotations; an empty or damaged annotation file leaves the
    record unlabelled with a warning naming the file (the signal is still good)."""
    import wfdb

    path = Path(str(base) + "." + ext)
    if not path.exists():
        return None
    if path.stat().st_size == 0:
        warnings.append(f"annotation file {path.name} is empty; the record is processed "
                        "unlabelled")
        return None
    try:
        a = wfdb.rdann(str(base), ext)
    except Exception as exc:
        warnings.append(f"annotation file {path.name} cannot be read ({type(exc).__name__}: "
                        f"{str(exc)[:120]}); the record is processed unlabelled; repair or "
                        "remove the file")
        return None
    sample = np.asarray(a.sample, dtype=np.int64) - int(offset)
    symbol = np.asarray(a.symbol, dtype=object)
    aux = np.asarray(a.aux_note if a.aux_note is not None else [""] * len(sample), dtype=object)
    sub = np.asarray(a.subtype if a.subtype is not None else np.zeros(len(sample)), dtype=np.int64)
    inside = (sample >= 0) & (sample < n_samples)
    return Annotations(sample=sample[inside], symbol=symbol[inside], aux=aux[inside],
                       source=path.name, subtype=sub[inside])


def _read(base: Path, cfg: ReadConfig, *, name, inputs, sampfrom: int = 0,
          sampto: int | None = None) -> Record:
    ranged = {"sampfrom": sampfrom, "sampto": sampto} if (sampfrom or sampto) else {}
    view = lower_case_view(base)
    if view == Path(base):
        return read_wfdb(base, cfg, name=name, inputs=inputs, **ranged)
    # a case view: messages and provenance name the user's files, not the links
    shown = original_header(Path(base))
    try:
        rec = read_wfdb(view, cfg, name=name or Path(base).name,
                        inputs=inputs or hashed(record_files(base, cfg)), **ranged)
    except RecordError as exc:
        raise RecordError(str(exc).replace(str(view) + ".hea", shown), stage=None) from None
    rec.path = shown
    return rec


FORMAT = Format(kind="wfdb", suffixes=(".hea",), read=_read, files=record_files,
                length=record_length, leads=header_leads, record_path=lambda p: p.with_suffix(""),
                record_name=lambda b: b.name, not_records=segment_headers)
