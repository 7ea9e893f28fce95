"""Per-record shards: a record's results written as soon as it is processed, trusted only once
its commit marker exists.

A shard is a folder holding ``tensor.npy``, ``mask.npy``, ``beats.arrow``, ``leads.arrow``,
``windows.arrow`` (Arrow IPC files, uncompressed: written and read several times faster than
Parquet, and a shard is scratch space) and ``meta.json``, then ``COMMIT.json``, written last,
holding the config hash,
the SHA-256 of every input file and of every shard file. A shard without a commit marker, or
whose files do not match it, is never trusted, so a run killed at any moment (or an object store
without atomic rename) leaves nothing a later run would wrongly reuse. Shard roots may be local
folders or fsspec URLs (for a Dask cluster's shared storage).
"""
from __future__ import annotations

import hashlib
import io
import json
import re

import numpy as np
import pandas as pd

from prep.model import StageLog
from prep.pipeline.result import RecordResult

COMMIT = "COMMIT.json"
_FILES = ("tensor.npy", "mask.npy", "beats.arrow", "leads.arrow", "windows.arrow",
          "meta.json")


def _fs(root: str):
    import fsspec
    return fsspec.core.url_to_fs(str(root))


def shard_name(record: str) -> str:
    """A file-system-safe, unique folder name for a record name."""
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "_", record)[:60]
    return f"{safe}-{hashlib.sha256(record.encode()).hexdigest()[:12]}"


def _npy(arr) -> bytes:
    b = io.BytesIO()
    np.save(b, np.ascontiguousarray(arr), allow_pickle=False)
    return b.getvalue()


def _ipc(df: pd.DataFrame) -> bytes:
    """A DataFrame as an Arrow IPC file (one thread: a worker process uses one core)."""
    import pyarrow as pa
    t = pa.Table.from_pandas(df, preserve_index=False, nthreads=1)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_file(sink, t.schema) as w:
        w.write_table(t)
    return sink.getvalue().to_pybytes()


def _read_ipc(data: bytes):
    import pyarrow as pa
    return pa.ipc.open_file(pa.BufferReader(data)).read_all()


def write_shard(root: str, res: RecordResult, config_hash: str, inputs: list) -> None:
    """Write one record's shard; the commit marker goes last."""
    fs, base = _fs(root)
    d = f"{base.rstrip('/')}/{shard_name(res.name)}"
    fs.makedirs(d, exist_ok=True)
    if fs.exists(f"{d}/{COMMIT}"):
        fs.rm(f"{d}/{COMMIT}")  # an old marker must not vouch for new files
    meta = {"name": res.name, "status": res.status, "error": res.error, "fs": res.fs,
            "duration_s": res.duration_s, "n_leads": res.n_leads, "inputs": res.inputs,
            "comments": res.comments, "warnings": res.warnings, "leads": res.leads,
            "logs": [lg.to_dict() for lg in res.logs], "kept": kept_summary(res.beats),
            "class_yield": res.class_yield}
    tensor = res.tensor if res.tensor is not None else np.zeros((0, 0, 0), np.float32)
    hashes = {"tensor.npy": _write_npy_hashed(fs, f"{d}/tensor.npy", tensor.astype(np.float32,
                                                                                   copy=False))}
    blobs = {
        "mask.npy": _npy(res.mask if res.mask is not None else np.zeros((0, 0), bool)),
        "beats.arrow": _ipc(res.beats if res.beats is not None else pd.DataFrame()),
        "leads.arrow": _ipc(pd.DataFrame(res.leads)),
        "windows.arrow": _ipc(res.windows if res.windows is not None else pd.DataFrame()),
        "meta.json": json.dumps(meta, default=_plain, sort_keys=True).encode(),
    }
    for name, data in blobs.items():
        with fs.open(f"{d}/{name}", "wb") as fh:
            fh.write(data)
    hashes.update({k: hashlib.sha256(v).hexdigest() for k, v in blobs.items()})
    commit = {"record": res.name, "config_sha256": config_hash, "inputs": [list(x) for x in inputs],
              "files": hashes}
    with fs.open(f"{d}/{COMMIT}", "wb") as fh:
        fh.write(json.dumps(commit, sort_keys=True).encode())


def kept_summary(beats: pd.DataFrame | None) -> dict:
    """What consolidation's first passes need of a record's beat table, so that they need not
    read it: kept beats per class (``null`` for unlabeled) and whether the kept beats' tensor
    rows are simply 0, 1, 2... in time order (then a record no split rule touches needs no
    table read to place its beats)."""
    if beats is None or not len(beats.columns):
        return {"classes": [], "in_order": True}
    inc = beats["included"].to_numpy(bool)
    vc = beats.loc[inc, "beat_class"].value_counts(dropna=False)
    ti = beats["tensor_index"].to_numpy()[inc]
    rs = beats["r_sample"].to_numpy()[inc]
    in_order = bool(np.array_equal(ti, np.arange(ti.size)) and np.all(np.diff(rs) >= 0))
    return {"classes": [[None if pd.isna(k) else str(k), int(v)] for k, v in vc.items()],
            "in_order": in_order}


class _HashingWriter:
    """A file wrapper that hashes what passes through it (the tensor is never copied to bytes)."""

    def __init__(self, fh):
        self.fh, self.h = fh, hashlib.sha256()

    def write(self, data) -> int:
        mv = memoryview(data)
        self.h.update(mv)
        return self.fh.write(mv)


def _write_npy_hashed(fs, path: str, arr: np.ndarray) -> str:
    with fs.open(path, "wb") as fh:
        w = _HashingWriter(fh)
        arr = np.ascontiguousarray(arr)
        np.lib.format.write_array_header_1_0(w, np.lib.format.header_data_from_array_1_0(arr))
        step = max(1, (8 << 20) // max(1, arr[:1].nbytes))  # about 8 MB a write
        for i in range(0, arr.shape[0], step):
            w.write(arr[i:i + step].tobytes())
    return w.h.hexdigest()


def _plain(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(type(o).__name__)


class OnDisk:
    """A shard's .npy array left on disk: its shape and dtype are known, and rows are read
    through a memory map made for that read only. (A map held per record would cost one
    kernel mapping each: tens of thousands of records would reach the system's limit.)"""

    def __init__(self, path: str):
        self.filename = path
        with open(path, "rb") as fh:
            version = np.lib.format.read_magic(fh)
            read = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                    else np.lib.format.read_array_header_2_0)
            self.shape, _, self.dtype = read(fh)
        self.ndim = len(self.shape)

    def __len__(self) -> int:
        return self.shape[0]

    def __getitem__(self, index) -> np.ndarray:
        m = np.load(self.filename, mmap_mode="r")
        out = np.array(m[index])
        del m
        return out


class ShardTables:
    """A committed shard's beat and window tables and stage logs, read only when asked for.

    Consolidation reads a record's tables while it visits that record, instead of holding
    every record's tables at once: memory then does not grow with the number of records. Each
    read is checked against the commit marker again.
    """

    def __init__(self, fs, folder: str, hashes: dict, n_rows: dict, kept: dict | None = None):
        self.fs, self.folder, self.hashes, self.n_rows = fs, folder, hashes, n_rows
        self.kept = kept  # kept_summary() of the beat table (None in shards written before it)

    def _bytes(self, name: str) -> bytes:
        """A shard file's bytes, checked against the commit marker."""
        with self.fs.open(f"{self.folder}/{name}", "rb") as fh:
            data = fh.read()
        if hashlib.sha256(data).hexdigest() != self.hashes.get(name):
            raise OSError(f"shard {self.folder}: {name} changed after it was committed; run the "
                          "same command again to redo this record")
        return data

    def stages(self) -> list[dict]:
        """The record's stage logs (as dicts), read from its meta.json and checked again."""
        return [StageLog(**lg).to_dict() for lg in json.loads(self._bytes("meta.json"))["logs"]]

    def arrow(self, table: str):
        """The 'beats' or 'windows' table as a pyarrow Table (None when the record wrote no such
        table), without building a DataFrame."""
        data = self._bytes(f"{table}.arrow")
        if self.n_rows.get(table) is None:
            return None
        return _read_ipc(data)


def read_shard(root: str, record: str, config_hash: str, inputs: list | None,
               verify: bool = True, tables: bool = True) -> RecordResult | None:
    """The record's committed shard, or None when absent, uncommitted, stale or corrupt.

    ``inputs`` (file, SHA-256) pairs must match the commit (None skips that check).
    ``tables=False`` leaves the beat and window tables and the stage logs on storage:
    ``res.beats`` and ``res.windows`` are None, ``res.logs`` is empty, and ``res.store`` (a
    :class:`ShardTables`) reads them on demand.
    """
    fs, base = _fs(root)
    d = f"{base.rstrip('/')}/{shard_name(record)}"
    try:
        with fs.open(f"{d}/{COMMIT}", "rb") as fh:
            commit = json.loads(fh.read())
    except (FileNotFoundError, ValueError, OSError):
        return None
    if commit.get("config_sha256") != config_hash or commit.get("record") != record:
        return None
    if inputs is not None and [list(x) for x in inputs] != commit.get("inputs"):
        return None
    protocols = fs.protocol if isinstance(fs.protocol, tuple) else (fs.protocol,)
    local = "file" in protocols
    blobs = _verified_blobs(fs, d, commit, local, verify)
    if blobs is None:
        return None
    meta = json.loads(blobs["meta.json"])
    res = RecordResult(meta["name"], meta["status"], meta["error"], meta["fs"], meta["duration_s"],
                       meta["n_leads"], [tuple(x) for x in meta["inputs"]],
                       comments=meta["comments"], warnings=meta["warnings"], leads=meta["leads"],
                       class_yield=meta.get("class_yield", {}))
    if tables or res.status == "failed":  # else the stage logs stay on storage (store.stages)
        res.logs = [StageLog(**lg) for lg in meta["logs"]]
    if local and not tables:  # left on disk: no mapping held per record
        res.tensor, res.mask = OnDisk(f"{d}/tensor.npy"), OnDisk(f"{d}/mask.npy")
    elif local:
        res.tensor = np.load(f"{d}/tensor.npy", mmap_mode="r")
        res.mask = np.load(f"{d}/mask.npy", mmap_mode="r")
    else:
        res.tensor = np.load(io.BytesIO(blobs["tensor.npy"]))
        res.mask = np.load(io.BytesIO(blobs["mask.npy"]))
    if tables:
        b = _read_ipc(blobs["beats.arrow"]).to_pandas()
        res.beats = b if len(b.columns) else None
        w = _read_ipc(blobs["windows.arrow"]).to_pandas()
        res.windows = w if len(w.columns) else None
    else:
        def rows(name):  # row count; None for a table with no columns
            t = _read_ipc(blobs[name])
            return t.num_rows if t.column_names else None
        res.store = ShardTables(fs, d, commit["files"], {"beats": rows("beats.arrow"),
                                                         "windows": rows("windows.arrow")},
                                meta.get("kept"))
    if res.status == "failed":
        res.tensor = res.mask = res.beats = None
        res.store = None
    return res


def _verified_blobs(fs, d: str, commit: dict, local: bool, verify: bool) -> dict | None:
    """The shard's small files as bytes, each checked against its commit digest (the local
    tensor files are hashed in chunks and left on disk); None when one is missing or differs."""
    big = ("tensor.npy", "mask.npy")
    blobs = {}
    try:
        for name in _FILES:
            if local and name in big:  # hashed in chunks, then memory-mapped: bounded memory
                if verify and _sha_stream(fs, f"{d}/{name}") != commit["files"].get(name):
                    return None
                continue
            with fs.open(f"{d}/{name}", "rb") as fh:
                blobs[name] = fh.read()
    except (FileNotFoundError, OSError):
        return None
    if verify and any(hashlib.sha256(v).hexdigest() != commit["files"].get(k)
                      for k, v in blobs.items()):
        return None
    return blobs


def _sha_stream(fs, path: str) -> str:
    h = hashlib.sha256()
    with fs.open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
