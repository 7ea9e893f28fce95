"""What the WFDB reader checks and caches before the wfdb library reads a record: the header as
text (readable, counts that agree, rate and length believable, signal files that hold the
declared samples), the parsed header once per process, and a lower-case view of records written
with upper-case suffixes."""
from __future__ import annotations

from functools import lru_cache
from pathlib import Path

from prep.errors import RecordError
from prep.io._files import check_rate


def parsed_header(base: Path):
    """``wfdb.rdheader`` of a record, parsed once per process while the file is unchanged
    (the lead peek, the length and the header check all need it; wfdb's parse takes a few ms)."""
    hea = Path(str(base) + ".hea")
    st = hea.stat()
    return _parsed_header(str(base), st.st_mtime_ns, st.st_size)


@lru_cache(maxsize=4096)  # a collection's lead pass and its processing pass share it
def _parsed_header(base: str, mtime_ns: int, size: int):
    quick = _quick_header(Path(base + ".hea"))
    if quick is not None:
        return quick
    import wfdb
    return wfdb.rdheader(base)


def _quick_header(hea: Path):
    """A single-segment header parsed as ``wfdb.rdheader`` parses it (its own line patterns,
    record-line parser, field defaults and types, the special cases of its signal-line parser;
    the text read as ASCII ignoring other bytes, as it does) into the same ``wfdb.Record``, but
    with the field table read once per process instead of a pandas look-up per field and
    signal (6 ms for a 12-lead header). None for anything else (multi-segment, no signal, a
    line the patterns do not match): the caller then asks wfdb itself.
    tests/io/test_formats.py compares every attribute of both on every header in ../shared and
    demo_records and on variants."""
    from wfdb.io import _header
    from wfdb.io.header import parse_header_content, rx_record, rx_signal
    from wfdb.io.record import Record
    try:
        text = hea.read_bytes().decode("ascii", errors="ignore")
    except OSError:
        return None
    lines, comments = parse_header_content(text)
    m = rx_record.match(lines[0]) if lines else None
    if m is None or m.group("n_seg") or not m.group("n_sig") or int(m.group("n_sig")) == 0:
        return None
    fields, specs = _signal_specs()
    sig: dict = {k: [] for k in fields}
    for line in lines[1:]:
        m = rx_signal.match(line)
        if m is None:
            return None
        got = dict(zip(fields, m.groups()))
        for k, (kind, default) in specs.items():
            v = got[k]
            if v == "":
                v = default
                if k == "baseline" and got["adc_zero"] != "":
                    v = int(got["adc_zero"])  # wfdb: a missing baseline is the ADC zero
            elif kind == "int":
                v = int(v)
            elif kind == "float":
                v = float(v)
                if k == "adc_gain" and v == 0:
                    v = 200.0  # wfdb: a gain of 0 means 200
            sig[k].append(v)
    try:
        rec_fields = _header._parse_record_line(lines[0])
    except Exception:  # noqa: BLE001 - a date or time wfdb cannot parse: let wfdb say so
        return None
    record = Record()
    for k, v in sig.items():
        setattr(record, k, v)
    for k, v in rec_fields.items():
        if k != "n_seg":
            setattr(record, k, v)
    record.comments = [ln.strip(" \t#") for ln in comments]
    return record


@lru_cache(maxsize=1)
def _signal_specs() -> tuple[list[str], dict]:
    """The signal-line fields in the order of wfdb's line pattern, and per field its kind and
    read default, from wfdb's own field table (wfdb.io._header.SIGNAL_SPECS)."""
    from wfdb.io._header import SIGNAL_SPECS, float_types, int_types
    from wfdb.io.header import rx_signal
    order = sorted(rx_signal.groupindex, key=rx_signal.groupindex.get)
    specs = {}
    for k in SIGNAL_SPECS.index:
        types = SIGNAL_SPECS.loc[k, "allowed_types"]
        kind = "int" if types is int_types else "float" if types is float_types else "str"
        specs[k] = (kind, SIGNAL_SPECS.loc[k, "read_default"])
    return order, specs


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


# bytes per sample of the WFDB storage formats whose size is fixed (WFDB signal file formats)
_FMT_BYTES = {"8": 1, "16": 2, "24": 3, "32": 4, "61": 2, "80": 1, "160": 2, "212": 1.5,
              "310": 4 / 3, "311": 4 / 3}
_MAX_SAMPLES = 2_000_000_000  # per signal; beyond this a header is not believable


def check_header(base: Path, shown: str, warnings: list[str],
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
