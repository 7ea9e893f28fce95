"""Reading records: WFDB (via ``wfdb``) and CSV (one column per lead).

Readers return a :class:`prep.model.Record` in mV with NaN for missing samples, the non-ECG
channels skipped with their reason, reference annotations when present, and the SHA-256 of every
file read. Errors name the file and say what to do.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import ReadConfig
from .errors import RecordError
from .leads import canonical_lead, classify_channel, scale_to_mv
from .model import Annotations, Record

#: Beat symbols that mark a QRS in WFDB annotations (PhysioNet annotation codes).
BEAT_SYMBOLS = frozenset("NLRBAaJSVrFejnE/fQ?")


@dataclass(frozen=True)
class Source:
    """One input record found on disk: its kind ('wfdb' or 'csv'), path and display name."""

    kind: str
    path: Path  # WFDB: the base path without extension; CSV: the file
    name: str


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def find_sources(items: list[str | Path]) -> tuple[list[Source], list[str]]:
    """Turn the user's arguments (header paths, base names, CSV files, folders) into sources.

    Returns the sources (sorted, de-duplicated) and messages for arguments that matched nothing.
    Record names come from the file name; where two inputs share one, they become the path
    relative to the common input root, without extension.
    """
    found: list[tuple[str, Path]] = []
    problems: list[str] = []
    for item in items:
        p = Path(item)
        if p.is_dir():
            hits = sorted(set(p.rglob("*.hea")) | set(p.rglob("*.csv")))
            if not hits:
                problems.append(f"folder {p} holds no WFDB header (.hea) or CSV file")
            for h in hits:
                found.append(("wfdb" if h.suffix == ".hea" else "csv", h))
        elif p.suffix.lower() == ".hea" and p.exists():
            found.append(("wfdb", p))
        elif p.suffix.lower() == ".csv" and p.exists():
            found.append(("csv", p))
        elif p.with_suffix(p.suffix + ".hea").exists() if p.suffix else p.with_suffix(".hea").exists():
            found.append(("wfdb", Path(str(p) + ".hea")))
        else:
            problems.append(f"{p}: no such record (give a .hea file, a record base name, a .csv "
                            "file or a folder)")
    uniq = sorted({(k, h.resolve()) for k, h in found}, key=lambda t: str(t[1]))
    bases = [(k, h.with_suffix("") if k == "wfdb" else h) for k, h in uniq]
    # multi-segment WFDB layouts: segment headers named by a master header are not records
    segment_names = _segment_names([b for k, b in bases if k == "wfdb"])
    bases = [(k, b) for k, b in bases if not (k == "wfdb" and b in segment_names)]
    names = [b.stem if k == "csv" else b.name for k, b in bases]
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        import os
        root = Path(os.path.commonpath([str(b.parent) for _, b in bases]))
        names = [str((b.with_suffix("") if k == "csv" else b).relative_to(root)) if n in dup else n
                 for (k, b), n in zip(bases, names)]
    return [Source(k, b, n) for (k, b), n in zip(bases, names)], problems


def _segment_names(bases: list[Path]) -> set[Path]:
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


def read_source(src: Source, cfg: ReadConfig) -> Record:
    if src.kind == "wfdb":
        return read_wfdb(src.path, cfg, name=src.name)
    return read_csv(src.path, cfg, name=src.name)


def read_wfdb(base: str | Path, cfg: ReadConfig = ReadConfig(), *, name: str | None = None) -> Record:
    """Read a WFDB record in physical units (mV) with its reference annotations, if any."""
    import wfdb

    base = Path(base)
    hea = Path(str(base) + ".hea")
    shown = str(hea)
    try:
        rec = wfdb.rdrecord(str(base), physical=True, return_res=64)
    except FileNotFoundError as exc:
        raise RecordError(f"a file of the record is missing ({exc.filename or exc}); restore it or "
                          "leave the record out", path=shown, stage="read") from None
    except Exception as exc:  # wfdb raises many types for malformed files
        raise RecordError(f"cannot read the WFDB record ({type(exc).__name__}: {exc}); check the "
                          "header and signal files", path=shown, stage="read") from None
    fs = float(rec.fs or 0)
    if not np.isfinite(fs) or fs <= 0 or fs > 100_000:
        raise RecordError(f"sampling rate {rec.fs!r} Hz is not usable; fix the header's frequency "
                          "field", path=shown, stage="read")
    sig = rec.p_signal
    if sig is None or sig.size == 0:
        raise RecordError("the record holds no samples", path=shown, stage="read")
    files = {hea}
    for fn in (rec.file_name or []):
        files.add(base.parent / fn)
    names = [str(n) for n in (rec.sig_name or [f"ch{i}" for i in range(sig.shape[1])])]
    units = [str(u or "") for u in (rec.units or [""] * len(names))]
    keep, skipped = [], []
    for i, (n, u) in enumerate(zip(names, units)):
        ok, why = classify_channel(n, u)
        (keep.append(i) if ok else skipped.append((n, why)))
    if not keep:
        raise RecordError("no ECG channel (all channels skipped: " +
                          "; ".join(w for _, w in skipped) + "); choose records with ECG leads",
                          path=shown, stage="read")
    data = np.ascontiguousarray(sig[:, keep].T, dtype=np.float64)
    data *= np.array([scale_to_mv(units[i]) for i in keep])[:, None]
    ann = _read_wfdb_annotations(base, cfg.annotation_extension, data.shape[1])
    if ann is not None:
        files.add(Path(str(base) + "." + cfg.annotation_extension))
    inputs = [(f.name, sha256_file(f)) for f in sorted(files) if f.exists()]
    return Record(name=name or base.name, fs=fs, signals=data,
                  lead_names=[names[i] for i in keep], leads=[canonical_lead(names[i]) for i in keep],
                  units=["mV"] * len(keep), inputs=inputs, skipped=skipped, annotations=ann,
                  comments=list(rec.comments or []), path=shown, channels=keep)


def _read_wfdb_annotations(base: Path, ext: str, n_samples: int) -> Annotations | None:
    import wfdb

    path = Path(str(base) + "." + ext)
    if not path.exists():
        return None
    try:
        a = wfdb.rdann(str(base), ext)
    except Exception as exc:
        raise RecordError(f"annotation file cannot be read ({type(exc).__name__}: {exc}); remove "
                          "or repair it", path=str(path), stage="read") from None
    sample = np.asarray(a.sample, dtype=np.int64)
    symbol = np.asarray(a.symbol, dtype=object)
    aux = np.asarray(a.aux_note if a.aux_note is not None else [""] * len(sample), dtype=object)
    sub = np.asarray(a.subtype if a.subtype is not None else np.zeros(len(sample)), dtype=np.int64)
    inside = (sample >= 0) & (sample < n_samples)
    return Annotations(sample=sample[inside], symbol=symbol[inside], aux=aux[inside],
                       source=path.name, subtype=sub[inside])


def read_csv(path: str | Path, cfg: ReadConfig = ReadConfig(), *, name: str | None = None,
             fs: float | None = None) -> Record:
    """Read a CSV record: a header row of lead names, one column per lead, values in mV.

    The rate comes from ``fs``, else ``cfg.csv_fs_hz``, else a sidecar JSON next to the file
    (``{"fs": 250, "units": "mV"}``). A column named ``time``/``t``/``sample`` is ignored.
    """
    import pandas as pd

    path = Path(path)
    shown = str(path)
    side = path.with_suffix(".json")
    meta = {}
    if side.exists():
        try:
            meta = json.loads(side.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise RecordError(f"sidecar {side.name} is not valid JSON ({exc})", path=shown,
                              stage="read") from None
    rate = fs or cfg.csv_fs_hz or meta.get("fs")
    try:
        rate = float(rate) if rate else 0.0
    except (TypeError, ValueError):
        rate = 0.0
    if not np.isfinite(rate) or rate <= 0 or rate > 100_000:
        raise RecordError("no usable sampling rate; pass --fs or write a sidecar "
                          f"{side.name} with {{\"fs\": <Hz>}}", path=shown, stage="read")
    try:
        df = pd.read_csv(path)
    except Exception as exc:
        raise RecordError(f"cannot parse the CSV ({type(exc).__name__}: {exc})", path=shown,
                          stage="read") from None
    df = df[[c for c in df.columns if str(c).strip().lower() not in ("time", "t", "sample", "time_s")]]
    units = str(meta.get("units", "mV"))
    keep, skipped = [], []
    for c in df.columns:
        ok, why = classify_channel(str(c), units)
        (keep.append(c) if ok else skipped.append((str(c), why)))
    if not keep or len(df) == 0:
        raise RecordError("no ECG column with samples", path=shown, stage="read")
    bad = [c for c in keep if not pd.api.types.is_numeric_dtype(df[c])]
    if bad:
        col = bad[0]
        conv = pd.to_numeric(df[col], errors="coerce")
        row = int(np.flatnonzero(conv.isna() & df[col].notna())[0]) + 2
        raise RecordError(f"column '{col}' holds text (first at line {row}: {df[col].iloc[row - 2]!r}); "
                          "leave cells empty for missing samples", path=shown, lead=str(col),
                          stage="read")
    data = df[keep].to_numpy(dtype=np.float64).T * scale_to_mv(units)
    files = [path] + ([side] if side.exists() else [])
    return Record(name=name or path.stem, fs=rate, signals=np.ascontiguousarray(data),
                  lead_names=[str(c) for c in keep], leads=[canonical_lead(str(c)) for c in keep],
                  units=["mV"] * len(keep), inputs=[(f.name, sha256_file(f)) for f in files],
                  skipped=skipped, path=shown,
                  channels=[list(df.columns).index(c) for c in keep])
