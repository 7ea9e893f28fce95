"""Finding and reading records of every registered format.

:data:`FORMATS` is the one registry: each input format is one module (:mod:`prep.io.wfdb`,
:mod:`prep.io.edf`, :mod:`prep.io.csv`) whose ``FORMAT`` names its suffixes and how to read it,
list its files, tell its length and its leads. Everything here works through the registry, so
adding a format is one module and one line below.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from prep.config import ReadConfig
from prep.errors import RecordError
from prep.io import csv, edf, wfdb
from prep.io._files import Format, annotation_csv, hashed
from prep.model import Annotations, Record

FORMATS: dict[str, Format] = {f.kind: f for f in (wfdb.FORMAT, edf.FORMAT, csv.FORMAT)}
_BY_SUFFIX = {s: f for f in FORMATS.values() for s in f.suffixes}


@dataclass(frozen=True)
class Source:
    """One input record found on disk: its format's kind (a key of :data:`FORMATS`), path and
    display name."""

    kind: str
    path: Path  # WFDB: the base path without extension; CSV, EDF: the file
    name: str

    @property
    def format(self) -> Format:
        return FORMATS[self.kind]


def _format_of(p: Path) -> Format | None:
    if p.name.lower().endswith(".annotations.csv"):
        return None  # reference annotations beside a record, not a record
    return _BY_SUFFIX.get(p.suffix.lower())


def _scan(folder: Path, notes: list[str]) -> list[Path]:
    """Files of every registered suffix under ``folder`` (any case), not following links to
    folders (a link loop cannot trap the scan); unreadable subfolders are reported."""
    def unreadable(err: OSError) -> None:
        notes.append(f"folder {err.filename} cannot be read ({err.strerror}); its records "
                        "are left out")
    hits = []
    for root, _dirs, files in os.walk(folder, onerror=unreadable):
        hits += [Path(root) / f for f in files if _format_of(Path(f))]
    return sorted(hits)


def find_sources(items: list[str | Path], *, notes: list[str] | None = None,
                 csv_rate: bool = False) -> tuple[list[Source], list[str]]:
    """Turn the user's arguments (record files, WFDB base names, folders) into sources.

    Returns the sources (sorted, de-duplicated) and messages for arguments that matched nothing
    (errors). ``notes`` collects what a folder scan left out, once each: unreadable subfolders,
    suffixes a reader cannot take, and CSV files beside WFDB or EDF records, which are taken as
    tables (a database's metadata), not records, unless named, given a rate (``csv_rate``: the
    user gave ``--fs``) or a sidecar JSON. Record names come from the file name; where two
    inputs share one, they become the path relative to the common input root, without extension.
    """
    found: list[tuple[Format, Path]] = []
    problems: list[str] = []
    notes = notes if notes is not None else []
    for item in items:
        p = Path(item)
        if p.is_dir():
            hits = _tables_left_out(_scan(p, notes), p, csv_rate, notes)
            if not hits:
                kinds = ", ".join(s for f in FORMATS.values() for s in f.suffixes)
                problems.append(f"folder {p} holds no record file ({kinds})")
            found += [(_format_of(h), h) for h in hits]
        elif p.is_file() and _format_of(p):
            found.append((_format_of(p), p))
        else:  # a record named without its suffix (a WFDB base name)
            named = [Path(str(p) + s) for s in _BY_SUFFIX if Path(str(p) + s).is_file()]
            if named:
                found.append((_format_of(named[0]), named[0]))
            else:
                hint = (" (a value? -v, -q and --overwrite take none: write -vv or --overwrite "
                        "alone)" if str(item).lower() in ("true", "false", "yes", "no")
                        or str(item).isdigit() else "")
                problems.append(f"{p}: no such record (give a record file, a WFDB record base "
                                f"name or a folder){hint}")
    uniq = sorted({(f.kind, h.resolve()) for f, h in found}, key=lambda t: str(t[1]))
    bases = [(k, FORMATS[k].record_path(h)) for k, h in uniq]
    parts: set[Path] = set()
    for f in FORMATS.values():
        parts |= f.not_records([b for k, b in bases if k == f.kind])
    bases = [(k, b) for k, b in bases if b not in parts]
    return [Source(k, b, n) for (k, b), n in zip(bases, _distinct_names(bases, notes))], problems


def _distinct_names(bases: list[tuple[str, Path]], notes: list[str]) -> list[str]:
    """Record names from file names; two inputs never share one. Shared names become the path
    relative to the common input root; a WFDB record and a file of another format with one base
    name in one folder keep the other's suffix (``rec`` and ``rec.csv``), with a note."""
    names = [FORMATS[k].record_name(b) for k, b in bases]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        root = Path(os.path.commonpath([str(b.parent) for _, b in bases]))
        names = [str(b.parent.relative_to(root) / FORMATS[k].record_name(b)) if n in dup else n
                 for (k, b), n in zip(bases, names)]
    still = {n for n in names if names.count(n) > 1}
    for n in sorted(still):
        kinds = [k for (k, _), m in zip(bases, names) if m == n]
        notes.append(f"{n}: {len(kinds)} inputs share this name ({', '.join(kinds)}); the ones "
                     "not WFDB keep their file suffix in the record name")
    return [f"{n}{b.suffix}" if n in still and k != "wfdb" else n
            for (k, b), n in zip(bases, names)]


def _tables_left_out(hits: list[Path], folder: Path, csv_rate: bool, notes: list[str]) -> list[Path]:
    """A folder's CSV files without a rate, beside records of another format, are left out."""
    csv = [h for h in hits if _format_of(h).kind == "csv"]
    if csv_rate or len(csv) == len(hits):
        return hits
    tables = [h for h in csv if not h.with_suffix(".json").exists()]
    if tables:
        shown = ", ".join(str(t.relative_to(folder)) for t in tables[:5])
        more = f" and {len(tables) - 5} more" if len(tables) > 5 else ""
        notes.append(f"{folder}: {len(tables)} CSV file{'s' if len(tables) > 1 else ''} beside "
                     f"its records taken as tables, not records ({shown}{more}); name a CSV, "
                     "give --fs or a sidecar JSON to read one as a record")
    return [h for h in hits if h not in tables]


def source_inputs(src: Source, cfg: ReadConfig) -> list[tuple[str, str]]:
    """(file name, SHA-256) of every file a source's record is read from, without decoding it."""
    return hashed(src.format.files(src.path, cfg))


def read_source(src: Source, cfg: ReadConfig, inputs=None, sampfrom: int = 0,
                sampto: int | None = None) -> Record:
    """Read any source; ``inputs`` (its files' checksums, when the caller has them) are not
    hashed again. ``sampfrom``/``sampto`` read one stretch of a record whose format gives a
    length (annotation samples then count from ``sampfrom``); see :func:`record_length`."""
    rec = src.format.read(src.path, cfg, name=src.name, inputs=inputs, sampfrom=sampfrom,
                          sampto=sampto)
    if rec.annotations is None:
        base = src.path if src.kind == "wfdb" else src.path.with_suffix("")
        try:
            rec.annotations = read_annotation_csv(annotation_csv(base), rec.fs, rec.n_samples,
                                                  offset=sampfrom)
        except RecordError as exc:  # the signal is fine: process it unlabelled
            rec.warnings.append(f"{exc}; the record is processed unlabelled")
    return rec


def record_length(src: Source) -> tuple[int, float]:
    """(samples, rate) of a record that can be read in stretches, from its header alone;
    (0, 0.0) for the others (CSV, multi-segment or several-rate WFDB, EDF+D, unreadable)."""
    try:
        return src.format.length(src.path)
    except Exception:
        return 0, 0.0


def source_leads(src: Source, cfg: ReadConfig, errors: list[str] | None = None) -> list[str] | None:
    """Canonical ECG leads of a source, from its header when the format allows; None when it
    cannot be read (the run then reports the record's own error; ``errors`` collects it)."""
    try:
        return src.format.leads(src.path, cfg)
    except Exception as exc:
        if errors is not None:
            errors.append(str(exc) if isinstance(exc, RecordError) else
                          f"{src.path}: {type(exc).__name__}: {exc}")
        return None


def read_annotation_csv(path: Path, fs: float, n_samples: int,
                        offset: int = 0) -> Annotations | None:
    """Reference annotations from a CSV with columns ``symbol`` and ``sample`` or ``time_s``
    (optional ``aux``), for databases that ship them that way; None when the file is absent.
    ``offset``: the record sample the signal read starts at (for a stretch of a long record)."""
    import pandas as pd

    if not path.exists():
        return None
    try:
        df = pd.read_csv(path, encoding_errors="strict")
    except UnicodeDecodeError:
        raise RecordError("annotation CSV is not text (binary content or an unknown encoding); "
                          "write it as UTF-8", path=str(path), stage="read") from None
    except Exception as exc:
        raise RecordError(f"annotation CSV cannot be parsed ({type(exc).__name__}: {exc})",
                          path=str(path), stage="read") from None
    if "symbol" not in df or not ({"sample", "time_s"} & set(df.columns)):
        raise RecordError("annotation CSV needs a 'symbol' column and a 'sample' or 'time_s' "
                          "column", path=str(path), stage="read")
    if "sample" in df:
        samp = pd.to_numeric(df["sample"], errors="coerce")
    else:
        samp = (pd.to_numeric(df["time_s"], errors="coerce") * fs).round()
    ok = samp.notna().to_numpy()
    samp = samp.to_numpy()[ok].astype(np.int64) - int(offset)
    sym = df["symbol"].astype(str).str.strip().to_numpy(dtype=object)[ok]
    aux = (df["aux"].fillna("").astype(str).to_numpy(dtype=object)[ok] if "aux" in df
           else np.full(samp.size, "", dtype=object))
    inside = (samp >= 0) & (samp < n_samples)
    return Annotations(samp[inside], sym[inside], aux=aux[inside], source=path.name)

