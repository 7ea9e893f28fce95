"""CSV records: a header row of lead names, one column per lead, values in mV; the rate from
``--fs``, the configuration or a sidecar JSON beside the file.

Registered in :data:`prep.io.sources.FORMATS` by :data:`FORMAT`.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from prep.config import ReadConfig
from prep.errors import RecordError
from prep.io._files import Format, annotation_csv, check_rate, hashed
from prep.leads import canonical_lead, classify_channel, scale_to_mv
from prep.model import Record


def record_files(path: Path, cfg: ReadConfig) -> list[Path]:
    """The CSV, its sidecar JSON and its annotation CSV, those present."""
    side, ann = path.with_suffix(".json"), annotation_csv(path.with_suffix(""))
    return [path] + [f for f in (side, ann) if f.exists()]


def read_csv(path: str | Path, cfg: ReadConfig = ReadConfig(), *, name: str | None = None,
             inputs=None, fs: float | None = None) -> Record:
    """Read a CSV record: a header row of lead names, one column per lead, values in mV.

    The rate comes from ``fs``, else ``cfg.csv_fs_hz``, else a sidecar JSON next to the file
    (``{"fs": 250, "units": "mV"}``). Separators ``,`` ``;`` and tab are recognized (with ``;``
    a decimal comma is read too). A time axis (a column named time, t, sample, index, time_s,
    ``Time (s)`` ..., or any column of evenly increasing values) is skipped, not read as a lead.
    """
    path = Path(path)
    shown = str(path)
    meta = _sidecar(path, shown)
    rate = _rate(fs or cfg.csv_fs_hz or meta.get("fs"), path, shown)
    df = _table(path, shown)
    units = str(meta.get("units", "mV"))
    keep, skipped = [], []
    for c in df.columns:
        why = _time_axis(str(c), df[c])
        ok, why = (False, why) if why else classify_channel(str(c), units)
        (keep.append(c) if ok else skipped.append((str(c), why)))
    if not keep or len(df) == 0:
        raise RecordError("no ECG column with samples", path=shown, stage="read")
    _check_numeric(df, keep, shown)
    data = df[keep].to_numpy(dtype=np.float64).T * scale_to_mv(units)
    return Record(name=name or path.stem, fs=rate, signals=np.ascontiguousarray(data),
                  lead_names=[str(c) for c in keep], leads=[canonical_lead(str(c)) for c in keep],
                  units=["mV"] * len(keep), inputs=inputs or hashed(record_files(path, cfg)),
                  skipped=skipped, path=shown,
                  channels=[list(df.columns).index(c) for c in keep])


def _sidecar(path: Path, shown: str) -> dict:
    side = path.with_suffix(".json")
    if not side.exists():
        return {}
    try:
        meta = json.loads(side.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError, OSError) as exc:
        raise RecordError(f"sidecar {side.name} is not valid JSON ({exc})", path=shown,
                          stage="read") from None
    if not isinstance(meta, dict):
        raise RecordError(f"sidecar {side.name} holds a {type(meta).__name__}, not an object; "
                          'write {"fs": <Hz>, "units": "mV"}', path=shown, stage="read")
    return meta


def _rate(value, path: Path, shown: str) -> float:
    try:
        rate = float(value) if value else 0.0
    except (TypeError, ValueError):
        rate = 0.0
    if not rate:
        raise RecordError("no sampling rate; pass --fs or write a sidecar "
                          f"{path.with_suffix('.json').name} with {{\"fs\": <Hz>}}", path=shown,
                          stage="read")
    check_rate(rate, shown)
    return rate


def _table(path: Path, shown: str):
    """The CSV as a DataFrame: ',' by default; ';' (decimal comma) or tab when the header row
    says so."""
    import pandas as pd
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            head = fh.readline()
        sep = max((",", ";", "\t"), key=head.count) if head else ","
        opts = {"sep": sep, "decimal": "," if sep == ";" else "."}
        return pd.read_csv(path, encoding_errors="strict", **opts)
    except UnicodeDecodeError:
        raise RecordError("the CSV is not text (binary content or an unknown encoding); write "
                          "it as UTF-8", path=shown, stage="read") from None
    except Exception as exc:
        raise RecordError(f"cannot parse the CSV ({type(exc).__name__}: {exc})", path=shown,
                          stage="read") from None


_TIME_NAMES = {"time", "t", "sample", "samples", "index", "idx", "timestamp", "time_s", "time_ms",
               "seconds", "sec", "s", "ms", "elapsed", "n"}


def _time_axis(name: str, col) -> str:
    """Why a column is a time axis, not a lead ('' when it is not one)."""
    import re
    key = re.sub(r"[\(\[].*?[\)\]]", "", name).strip().lower().replace(" ", "_")
    if key in _TIME_NAMES:
        return f"column '{name}' is a time axis, not a lead"
    v = col.to_numpy(dtype=float, na_value=np.nan) if col.dtype.kind in "iuf" else None
    if v is not None and v.size > 10 and np.isfinite(v).all():
        d = np.diff(v)
        if d[0] > 0 and np.allclose(d, d[0], rtol=1e-6, atol=1e-9 * max(1.0, abs(v[-1]))):
            return f"column '{name}' increases in even steps: a time axis, not a lead"
    return ""


def _check_numeric(df, keep: list, shown: str) -> None:
    import pandas as pd
    bad = [c for c in keep if not pd.api.types.is_numeric_dtype(df[c])]
    if bad:
        col = bad[0]
        conv = pd.to_numeric(df[col], errors="coerce")
        row = int(np.flatnonzero(conv.isna() & df[col].notna())[0]) + 2
        raise RecordError(f"column '{col}' holds text (first at line {row}: "
                          f"{df[col].iloc[row - 2]!r}); leave cells empty for missing samples",
                          path=shown, lead=str(col), stage="read")


def _read(path: Path, cfg: ReadConfig, *, name, inputs, sampfrom: int = 0,
          sampto: int | None = None) -> Record:
    if sampfrom or sampto:
        raise ValueError("CSV records are read whole")
    return read_csv(path, cfg, name=name, inputs=inputs)


FORMAT = Format(kind="csv", suffixes=(".csv",), read=_read, files=record_files,
                length=lambda path: (0, 0.0), leads=lambda path, cfg: read_csv(path, cfg).leads)
