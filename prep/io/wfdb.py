"""WFDB records (PhysioNet's open format): a ``.hea`` header naming signal files, read with
``wfdb``; reference annotations from the file named by ``ReadConfig.annotation_extension``.

Registered in :data:`prep.io.sources.FORMATS` by :data:`FORMAT`.
"""
from __future__ import annotations

from functools import lru_cache
from pathlib import Path

import numpy as np

from prep.config import ReadConfig
from prep.errors import RecordError
from prep.io._files import Format, annotation_csv, check_rate, hashed
from prep.leads import canonical_lead, classify_channel, scale_to_mv
from prep.model import Annotations, Record


def parsed_header(base: Path):
    """``wfdb.rdheader`` of a record, parsed once per process while the file is unchanged
    (the lead peek, the length and the header check all need it; wfdb's parse takes a few ms)."""
    hea = Path(str(base) + ".hea")
    st = hea.stat()
    return _parsed_header(str(base), st.st_mtime_ns, st.st_size)


@lru_cache(maxsize=64)
def _parsed_header(base: str, mtime_ns: int, size: int):
    import wfdb
    return wfdb.rdheader(base)


def lower_case_view(base: Path) -> Path:
    """The record as the wfdb library can open it (it opens ``<base>.hea``): ``base`` itself,
    or for a record written with upper- or mixed-case suffixes (``REC.HEA``, ``REC.DAT``), a
    folder of links (made once per process, removed at exit) where its files also answer to
    their lower-case suffixes."""
    base = Path(base)
    if Path(str(base) + ".hea").exists():
        return base
    return _view(str(base))


@lru_cache(maxsize=256)
def _view(base: str) -> Path:
    import atexit
    import shutil
    import tempfile
    b = Path(base)
    try:
        files = [f for f in b.parent.iterdir()
                 if f.is_file() and f.name.lower().startswith(b.name.lower() + ".")]
    except OSError:
        return b
    head = [f for f in files if f.suffix.lower() == ".hea"]
    if not head:
        return b
    named = [b.parent / ln.split()[0] for ln in head[0].read_bytes().decode("latin-1").splitlines()[1:]
             if ln.strip() and not ln.startswith("#") and ln.split()[0] != "~"]
    d = Path(tempfile.mkdtemp(prefix="beatmill-case-"))
    atexit.register(shutil.rmtree, d, True)
    for f in {*files, *(f for f in named if f.is_file())}:
        for name in {f.name, f.stem + f.suffix.lower(), b.name + f.suffix.lower()}:
            if not (d / name).exists():
                (d / name).symlink_to(f.resolve())
    return d / b.name


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
    safe = _check_header(base, shown, warnings, spf)
    if any(x != 1 for x in spf):  # several rates: read every sample of the ECG leads instead
        return _read_multirate(base, spf, cfg, name, shown, warnings, inputs)
    end = min(x for x in (safe, sampto) if x) if (safe or sampto) else None
    try:
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


# bytes per sample of the WFDB storage formats whose size is fixed (WFDB signal file formats)
_FMT_BYTES = {"8": 1, "16": 2, "24": 3, "32": 4, "61": 2, "80": 1, "160": 2, "212": 1.5,
              "310": 4 / 3, "311": 4 / 3}
_MAX_SAMPLES = 2_000_000_000  # per signal; beyond this a header is not believable


def _check_header(base: Path, shown: str, warnings: list[str],
                  spf_out: list[int] | None = None) -> int | None:
    """Check a header against its signal files before reading; returns a safe ``sampto``.

    Catches what would otherwise crash or exhaust memory: text that is not a header, a missing or
    absurd rate or length, and a declared length far beyond what the files hold (then only the
    samples present are read, with a warning).
    """

    tokens = _header_lines(Path(str(base) + ".hea"), shown, warnings)[0].split()
    try:
        h = parsed_header(base)
    except Exception as exc:
        raise RecordError(f"the header cannot be parsed ({type(exc).__name__}: {exc}); compare it "
                          "with the WFDB header format", path=shown, stage="read") from None
    if spf_out is not None:  # samples per frame, read from the header once for the caller
        spf_out[:] = [int(x or 1) for x in (getattr(h, "samps_per_frame", None) or [1])]
    fs = float(h.fs or 0)
    if len(tokens) >= 3:
        field = tokens[2].split("/")[0].split("(")[0]
        try:
            declared = float(field)
        except ValueError:
            declared = float("nan")
        if not declared == fs:
            raise RecordError(f"the header's frequency field {tokens[2]!r} is not a plain number "
                              f"(WFDB reads it as {fs:g} Hz); fix it", path=shown, stage="read")
    check_rate(fs, shown)
    if getattr(h, "n_seg", None):
        return None  # multi-segment records: wfdb checks their segments itself
    if h.sig_len is not None and h.sig_len > _MAX_SAMPLES:
        raise RecordError(f"the header declares {h.sig_len} samples per signal, which is not "
                          "believable; fix the length field", path=shown, stage="read")
    _check_shared_files(h, shown)
    if not h.sig_len or not h.file_name:
        return None
    have = _frames_present(h, base, shown)
    if have is None:
        return None
    if have <= 0:
        raise RecordError("the signal file holds no samples (zero-length record)", path=shown,
                          stage="read")
    if have < h.sig_len:
        warnings.append(f"header declares {h.sig_len} samples but the signal file holds {have}; "
                        f"the {have} present are used")
        return have
    return None


def _header_lines(hea: Path, shown: str, warnings: list[str]) -> list[str]:
    """The header's record and signal lines, checked as text before wfdb parses it: readable,
    text, a record line 'name n_signals [fs [n_samples]]' and as many signal lines as it
    declares (a multi-segment header lists segments instead)."""
    try:
        raw = hea.read_bytes()
    except FileNotFoundError:
        raise RecordError("header file is missing", path=shown, stage="read") from None
    except IsADirectoryError:
        raise RecordError("the header path is a folder, not a file", path=shown,
                          stage="read") from None
    except PermissionError:
        raise RecordError("the header file cannot be read (permission denied); ask its owner "
                          "for read access", path=shown, stage="read") from None
    if b"\x00" in raw[:4096]:
        raise RecordError("this is not a WFDB header (binary content); point at the .hea text "
                          "file", path=shown, stage="read")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[:exc.start].count(b"\n") + 1
        warnings.append(f"the header is not UTF-8 text (byte 0x{raw[exc.start]:02x} on line "
                        f"{line}); read as Latin-1, characters outside ASCII may be dropped")
        text = raw.decode("latin-1")
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise RecordError("the header holds no record line", path=shown, stage="read")
    tokens = lines[0].split()
    if len(tokens) < 2 or not tokens[1].isdigit():
        raise RecordError(f"the header's record line {lines[0][:60]!r} is not 'name n_signals "
                          "[fs [n_samples]]'", path=shown, stage="read")
    declared, multi = int(tokens[1]), "/" in tokens[0]
    if not multi and len(lines) - 1 != declared:
        raise RecordError(f"the record line declares {declared} signal"
                          f"{'s' * (declared != 1)} but the header has {len(lines) - 1} signal "
                          "line(s); make the count match the lines", path=shown, stage="read")
    if len(tokens) < 3:
        warnings.append("the header gives no sampling rate; the WFDB default of 250 Hz is used")
    return lines


def _check_shared_files(h, shown: str) -> None:
    """Signals stored in one file must start at one byte offset (interleaved frames): the
    reader would otherwise take every other sample of one signal as the other's."""
    if not h.file_name or not h.byte_offset:
        return
    for fn in sorted(set(h.file_name)):
        offs = {int(h.byte_offset[i] or 0) for i, f in enumerate(h.file_name) if f == fn}
        if len(offs) > 1:
            raise RecordError(f"signals stored one after another in {fn} (byte offsets "
                              f"{sorted(offs)}) cannot be read without mixing their samples; "
                              "write each signal to its own file (or as interleaved frames)",
                              path=shown, stage="read")


def _frames_present(h, base: Path, shown: str) -> int | None:
    """Frames the signal files hold (the smallest over files; None when sizes say nothing)."""
    frames = []
    for fn in sorted(set(h.file_name)):
        idx = [i for i, f in enumerate(h.file_name) if f == fn]
        fmts = [str(h.fmt[i]) for i in idx]
        if any(f not in _FMT_BYTES for f in fmts):
            if any(f not in ("508", "516", "524") for f in fmts):
                raise RecordError(f"signal format {fmts} of {fn} is not a WFDB format this "
                                  "reader knows", path=shown, stage="read")
            continue  # FLAC-compressed: size says nothing
        path = base.parent / fn
        if not path.is_file():
            raise RecordError(f"signal file {fn} is missing or not a file; restore it or leave "
                              "the record out", path=shown, stage="read")
        offset = max([int(h.byte_offset[i] or 0) for i in idx] if h.byte_offset else [0])
        per_frame = sum(_FMT_BYTES[f] for f in fmts)
        frames.append(int((path.stat().st_size - offset) // per_frame))
    return min(frames) if frames else None


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
