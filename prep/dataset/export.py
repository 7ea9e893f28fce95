"""Writing a dataset folder: tensors, tables and the manifest, each file written atomically."""
from __future__ import annotations

import hashlib
import io
import json
import os
import platform
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _atomic(path: Path, write) -> None:
    """Write through a temporary file in the same folder, then rename over ``path``. The file
    gets the mode a plain ``open`` would give it (0666 less the umask), not the temporary
    file's 0600, so colleagues reading a shared dataset folder can read every file."""
    fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        write(Path(tmp))
        os.chmod(tmp, 0o666 & ~_umask())
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


def _json_text(value: Any, depth: int) -> str:
    """``value`` as indented JSON, as it reads at nesting ``depth`` of a larger document."""
    text = json.dumps(_clean(json.loads(json.dumps(value, default=_jsonable))), indent=2,
                      ensure_ascii=False)
    return text.replace("\n", "\n" + "  " * depth)


def write_manifest(path: Path, manifest: dict) -> None:
    """Write the manifest as indented JSON. A top-level value that is a Mapping but not a dict
    (the per-record section of a large run) is written one entry at a time, so the whole
    document is never held in memory; the text is the same as ``json.dumps(..., indent=2)``
    of the equivalent dict."""
    from collections.abc import Mapping

    def key(k) -> str:
        return json.dumps(str(k), ensure_ascii=False)

    def write(p: Path) -> None:
        with open(p, "w", encoding="utf-8") as fh:
            fh.write("{")
            for i, (k, v) in enumerate(manifest.items()):
                fh.write(("," if i else "") + "\n  " + key(k) + ": ")
                if isinstance(v, Mapping) and not isinstance(v, dict) and len(v):
                    fh.write("{")
                    for j, (k2, v2) in enumerate(v.items()):
                        fh.write(("," if j else "") + "\n    " + key(k2) + ": " +
                                 _json_text(v2, 2))
                    fh.write("\n  }")
                else:
                    fh.write(_json_text(dict(v) if isinstance(v, Mapping) else v, 1))
            fh.write("\n}\n" if manifest else "}\n")
    _atomic(path, write)


def environment() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {"python": platform.python_version(), "platform": platform.platform(terse=True)}
    for pkg in ("numpy", "scipy", "pandas", "pyarrow", "wfdb", "neurokit2"):
        try:
            out[pkg] = version(pkg)
        except PackageNotFoundError:
            out[pkg] = "not installed"
    return out


class NpyWriter:
    """A .npy file written slice by slice with plain writes (no memory map), so the memory a
    consolidation needs does not grow with the dataset. Supports ``w[a:b] = rows`` only.
    When the slices come in order, the file's SHA-256 is computed on the way (``sha256``), so
    the manifest need not read the file back."""

    def __init__(self, path: Path, shape: tuple, dtype):
        self.path, self.shape, self.dtype = Path(path), tuple(shape), np.dtype(dtype)
        self.row = int(np.prod(self.shape[1:])) * self.dtype.itemsize
        head = io.BytesIO()
        np.lib.format.write_array_header_1_0(
            head, {"descr": np.lib.format.dtype_to_descr(self.dtype), "fortran_order": False,
                   "shape": self.shape})
        self._fh = open(self.path, "wb")
        self._fh.write(head.getvalue())
        self._hash, self._next = hashlib.sha256(head.getvalue()), 0
        self.offset = self._fh.tell()
        self._fh.truncate(self.offset + self.row * self.shape[0])

    def __setitem__(self, key: slice, value) -> None:
        start = key.start or 0
        data = np.ascontiguousarray(value, dtype=self.dtype).reshape(-1).view(np.uint8)
        if self._hash is not None:
            if start == self._next:
                self._hash.update(data)
                self._next += len(data) // max(1, self.row)
            else:  # out of order: the file is hashed when it is closed instead
                self._hash = None
        self._fh.seek(self.offset + start * self.row)
        self._fh.write(data)

    @property
    def sha256(self) -> str | None:
        """The file's SHA-256 when every row was written once, in order (else None)."""
        if self._hash is None or self._next != self.shape[0]:
            return None
        return self._hash.hexdigest()

    def close(self) -> None:
        if not self._fh.closed:
            self._fh.flush()
            os.fsync(self._fh.fileno())
            self._fh.close()
