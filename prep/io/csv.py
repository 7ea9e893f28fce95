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
             inputs=None,
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
    if not rate:
        raise RecordError("no sampling rate; pass --fs or write a sidecar "
                          f"{side.name} with {{\"fs\": <Hz>}}", path=shown, stage="read")
    check_rate(rate, shown)
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
    return Record(name=name or path.stem, fs=rate, signals=np.ascontiguousarray(data),
                  lead_names=[str(c) for c in keep], leads=[canonical_lead(str(c)) for c in keep],
                  units=["mV"] * len(keep), inputs=inputs or hashed(record_files(path, cfg)),
                  skipped=skipped, path=shown,
                  channels=[list(df.columns).index(c) for c in keep])


def _read(path: Path, cfg: ReadConfig, *, name, inputs, sampfrom: int = 0,
          sampto: int | None = None) -> Record:
    if sampfrom or sampto:
        raise ValueError("CSV records are read whole")
    return read_csv(path, cfg, name=name, inputs=inputs)


FORMAT = Format(kind="csv", suffixes=(".csv",), read=_read, files=record_files,
                length=lambda path: (0, 0.0), leads=lambda path, cfg: read_csv(path, cfg).leads)
