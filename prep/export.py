"""Writing a dataset folder: tensors, tables and the manifest, each file written atomically."""
from __future__ import annotations

import hashlib
import json
import os
import platform
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

TENSOR_FILES = ("beats.npy", "lead_mask.npy", "norm_center.npy", "norm_scale.npy")
TABLE_FILES = ("beats.parquet", "leads.parquet", "records.parquet", "windows.parquet")
MANIFEST = "manifest.json"


def sha256_path(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _atomic(path: Path, write) -> None:
    """Write through a temporary file in the same folder, then rename over ``path``."""
    fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        write(Path(tmp))
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_npy(path: Path, arr: np.ndarray) -> None:
    def save(p: Path) -> None:
        with open(p, "wb") as fh:  # a file object: np.save would append .npy to a path
            np.save(fh, np.ascontiguousarray(arr), allow_pickle=False)
    _atomic(path, save)


def write_parquet(path: Path, df: pd.DataFrame) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pandas(df, preserve_index=False)
    _atomic(path, lambda p: pq.write_table(table, p, compression="zstd"))


def _jsonable(o: Any):
    if isinstance(o, (np.integer,)):
        return int(o)
    if isinstance(o, (np.floating,)):
        return None if not np.isfinite(o) else float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, (np.bool_,)):
        return bool(o)
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON-serialisable: {type(o).__name__}")


def _clean(o: Any):
    """Replace non-finite floats by None, recursively (JSON has no NaN)."""
    if isinstance(o, float):
        return o if np.isfinite(o) else None
    if isinstance(o, dict):
        return {str(k): _clean(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_clean(v) for v in o]
    return o


def write_manifest(path: Path, manifest: dict) -> None:
    text = json.dumps(_clean(json.loads(json.dumps(manifest, default=_jsonable))), indent=2,
                      sort_keys=False, ensure_ascii=False)
    _atomic(path, lambda p: p.write_text(text + "\n", encoding="utf-8"))


def environment() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {"python": platform.python_version(), "platform": platform.platform(terse=True)}
    for pkg in ("numpy", "scipy", "pandas", "pyarrow", "wfdb", "neurokit2"):
        try:
            out[pkg] = version(pkg)
        except PackageNotFoundError:
            out[pkg] = "not installed"
    return out
