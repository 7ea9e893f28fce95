"""Shards: the results of one worker task (one record, or a batch of short records) written
as soon as they are processed, trusted only once their commit marker exists.

A shard is a folder holding ``data.bin`` and ``COMMIT.json``. ``data.bin`` holds, record after
record, each record's ``tensor.npy``, ``mask.npy``, ``beats.arrow``, ``leads.arrow``,
``windows.arrow`` (Arrow IPC files, uncompressed: written and read several times faster than
Parquet, and a shard is scratch space) and ``meta.json``, one after another (each starting at a
multiple of 64 bytes). ``COMMIT.json``, written last, holds the config hash and, per record, its
name, the SHA-256 of every input file, and the offset, length and SHA-256 of each of its files
inside ``data.bin``. A shard without a commit marker, or a record whose files do not match it,
is never trusted, so a run killed at any moment (or an object store without atomic rename)
leaves nothing a later run would wrongly reuse. Batching short records into one shard keeps a
collection of 20,000 10-second records from making 20,000 folders of small files. Shard roots
may be local folders or fsspec URLs (for a Dask cluster's shared storage).
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
DATA = "data.bin"
_NAMES = ("tensor.npy", "mask.npy", "beats.arrow", "leads.arrow", "windows.arrow", "meta.json")
_ALIGN = 64  # each file in data.bin starts at a multiple of this (aligned memory maps)


def _fs(root: str):
    import fsspec
    return fsspec.core.url_to_fs(str(root))


def _safe(name: str, n: int) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name)[:n]


def shard_name(record: str) -> str:
    """A file-system-safe, unique folder name for a record name."""
    return f"{_safe(record, 60)}-{hashlib.sha256(record.encode()).hexdigest()[:12]}"


def shard_folder(records: list[str]) -> str:
    """The folder name of a shard holding these records (a record's own name when alone)."""
    if len(records) == 1:
        return shard_name(records[0])
    first = _safe(records[0], 40)
    digest = hashlib.sha256("\n".join(records).encode()).hexdigest()[:12]
    return f"batch-{first}-{len(records)}-{digest}"


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


def write_shard(root: str, results: list[RecordResult], config_hash: str,
                inputs: list[list]) -> str:
    """Write one task's shard (``inputs``: each record's (file, SHA-256) pairs); the commit
    marker goes last. Returns the shard's folder name."""
    fs, base = _fs(root)
    name = shard_folder([r.name for r in results])
    d = f"{base.rstrip('/')}/{name}"
    fs.makedirs(d, exist_ok=True)
    if fs.exists(f"{d}/{COMMIT}"):
        fs.rm(f"{d}/{COMMIT}")  # an old marker must not vouch for new files
    entries = []
    with fs.open(f"{d}/{DATA}", "wb") as fh:
        pack = _PackWriter(fh)
        for res, ins in zip(results, inputs):
            files = {"tensor.npy": pack.npy(res.tensor.astype(np.float32, copy=False)
                                            if res.tensor is not None
                                            else np.zeros((0, 0, 0), np.float32))}
            for k, data in _blobs(res).items():
                files[k] = pack.blob(data)
            entries.append({"record": res.name, "inputs": [list(x) for x in ins],
                            "files": files})
    commit = {"config_sha256": config_hash, "records": entries}
    with fs.open(f"{d}/{COMMIT}", "wb") as fh:
        fh.write(json.dumps(commit, sort_keys=True).encode())
    return name


def _blobs(res: RecordResult) -> dict[str, bytes]:
    """A record's small files as bytes."""
    meta = {"name": res.name, "status": res.status, "error": res.error, "fs": res.fs,
            "duration_s": res.duration_s, "n_leads": res.n_leads, "inputs": res.inputs,
            "comments": res.comments, "warnings": res.warnings, "leads": res.leads,
            "logs": [lg.to_dict() for lg in res.logs], "kept": kept_summary(res.beats),
            "class_yield": res.class_yield}
    return {
        "mask.npy": _npy(res.mask if res.mask is not None else np.zeros((0, 0), bool)),
        "beats.arrow": _ipc(res.beats if res.beats is not None else pd.DataFrame()),
        "leads.arrow": _ipc(pd.DataFrame(res.leads)),
        "windows.arrow": _ipc(res.windows if res.windows is not None else pd.DataFrame()),
        "meta.json": json.dumps(meta, default=_plain, sort_keys=True).encode(),
    }


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


class _PackWriter:
    """Writes files one after another into one open file: each aligned, hashed as it passes
    (the tensor is never copied to bytes); returns each file's [offset, length, SHA-256]."""

    def __init__(self, fh):
        self.fh, self.pos = fh, 0

    def _start(self) -> int:
        pad = -self.pos % _ALIGN
        if pad:
            self.fh.write(b"\0" * pad)
            self.pos += pad
        return self.pos

    def _write(self, data, h) -> None:
        mv = memoryview(data)
        h.update(mv)
        self.fh.write(mv)
        self.pos += mv.nbytes

    def blob(self, data: bytes) -> list:
        start, h = self._start(), hashlib.sha256()
        self._write(data, h)
        return [start, self.pos - start, h.hexdigest()]

    def npy(self, arr: np.ndarray) -> list:
        start, h = self._start(), hashlib.sha256()
        arr = np.ascontiguousarray(arr)
        head = io.BytesIO()
        np.lib.format.write_array_header_1_0(head, np.lib.format.header_data_from_array_1_0(arr))
        self._write(head.getvalue(), h)
        step = max(1, (8 << 20) // max(1, arr[:1].nbytes))  # about 8 MB a write
        for i in range(0, arr.shape[0], step):
            self._write(arr[i:i + step].tobytes(), h)
        return [start, self.pos - start, h.hexdigest()]


def _plain(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    raise TypeError(type(o).__name__)


class OnDisk:
    """A shard's .npy array left on disk (at ``offset`` inside its file): its shape and dtype
    are known, and rows are read through a memory map made for that read only. (A map held
    per record would cost one kernel mapping each: tens of thousands of records would reach
    the system's limit.)"""

    def __init__(self, path: str, offset: int = 0):
        self.filename = path
        with open(path, "rb") as fh:
            fh.seek(offset)
            version = np.lib.format.read_magic(fh)
            read = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                    else np.lib.format.read_array_header_2_0)
            self.shape, self._fortran, self.dtype = read(fh)
            self.offset = fh.tell()
        self.ndim = len(self.shape)

    def __len__(self) -> int:
        return self.shape[0]

    def _map(self):
        if not int(np.prod(self.shape)):
            return np.zeros(self.shape, self.dtype)
        return np.memmap(self.filename, self.dtype, "r", self.offset, self.shape,
                         order="F" if self._fortran else "C")

    def __getitem__(self, index) -> np.ndarray:
        m = self._map()
        out = np.array(m[index])
        del m
        return out


class ShardTables:
    """A committed shard record's beat and window tables and stage logs, read only when asked.

    Consolidation reads a record's tables while it visits that record, instead of holding
    every record's tables at once: memory then does not grow with the number of records. Each
    read is checked against the commit marker again.
    """

    def __init__(self, fs, folder: str, files: dict, n_rows: dict, kept: dict | None = None):
        self.fs, self.folder, self.files, self.n_rows = fs, folder, files, n_rows
        self.kept = kept  # kept_summary() of the beat table

    def _bytes(self, name: str) -> bytes:
        """A shard file's bytes, checked against the commit marker."""
        data = _read_range(self.fs, f"{self.folder}/{DATA}", self.files[name])
        if hashlib.sha256(data).hexdigest() != self.files[name][2]:
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


def _read_range(fs, path: str, where: list) -> bytes:
    offset, length = int(where[0]), int(where[1])
    with fs.open(path, "rb") as fh:
        fh.seek(offset)
        return fh.read(length)


class ShardIndex:
    """The committed shards under a root: which shard folders hold which record, and each
    folder's commit marker, read once (a batch's marker serves all of its records)."""

    def __init__(self, root: str):
        self.root = root
        self.fs, base = _fs(root)
        self.base = base.rstrip("/")
        self._commits: dict[str, dict | None] = {}
        self._where: dict[str, list[str]] | None = None

    def commit(self, folder: str) -> dict | None:
        """A folder's commit marker (None when absent or unreadable), read once."""
        if folder not in self._commits:
            try:
                with self.fs.open(f"{self.base}/{folder}/{COMMIT}", "rb") as fh:
                    c = json.loads(fh.read())
                self._commits[folder] = c if isinstance(c.get("records"), list) else None
            except (FileNotFoundError, ValueError, OSError):
                self._commits[folder] = None
        return self._commits[folder]

    def forget(self, folder: str) -> None:
        """Read the folder's marker again next time (its task has just written it)."""
        self._commits.pop(folder, None)

    def folders(self, record: str) -> list[str]:
        """Shard folders whose commit marker names the record (its own folder first)."""
        if self._where is None:
            self._where = {}
            try:
                paths = self.fs.glob(f"{self.base}/*/{COMMIT}")
            except (FileNotFoundError, OSError):
                paths = []
            for p in sorted(paths):
                folder = p.rstrip("/").split("/")[-2]
                for e in (self.commit(folder) or {}).get("records", []):
                    self._where.setdefault(str(e.get("record")), []).append(folder)
        own = shard_name(record)
        return [own] + [f for f in self._where.get(record, []) if f != own]

    def read(self, record: str, config_hash: str, inputs: list | None, verify: bool = True,
             tables: bool = True, folder: str | None = None) -> RecordResult | None:
        """The record's committed result (from ``folder``, else from any shard naming it),
        or None when absent, uncommitted, stale or corrupt."""
        for f in ([folder] if folder else self.folders(record)):
            res = self._read(f, record, config_hash, inputs, verify, tables)
            if res is not None:
                return res
        return None

    def _read(self, folder, record, config_hash, inputs, verify, tables):
        commit = self.commit(folder)
        if commit is None or commit.get("config_sha256") != config_hash:
            return None
        entry = next((e for e in commit["records"] if e.get("record") == record), None)
        if entry is None:
            return None
        if inputs is not None and [list(x) for x in inputs] != entry.get("inputs"):
            return None
        fs, d = self.fs, f"{self.base}/{folder}"
        protocols = fs.protocol if isinstance(fs.protocol, tuple) else (fs.protocol,)
        local = "file" in protocols
        files = entry["files"]
        blobs = _verified_blobs(fs, f"{d}/{DATA}", files, local, verify)
        if blobs is None:
            return None
        meta = json.loads(blobs["meta.json"])
        res = RecordResult(meta["name"], meta["status"], meta["error"], meta["fs"],
                           meta["duration_s"], meta["n_leads"], [tuple(x) for x in meta["inputs"]],
                           comments=meta["comments"], warnings=meta["warnings"],
                           leads=meta["leads"], class_yield=meta.get("class_yield", {}))
        if tables or res.status == "failed":  # else the stage logs stay on storage (store.stages)
            res.logs = [StageLog(**lg) for lg in meta["logs"]]
        if local:
            tensor, mask = (OnDisk(f"{d}/{DATA}", files[k][0]) for k in ("tensor.npy", "mask.npy"))
            # left on disk when lazy (no mapping held per record), else mapped
            res.tensor, res.mask = (tensor, mask) if not tables else (tensor._map(), mask._map())
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
            res.store = ShardTables(fs, d, files, {"beats": rows("beats.arrow"),
                                                   "windows": rows("windows.arrow")},
                                    meta.get("kept"))
        if res.status == "failed":
            res.tensor = res.mask = res.beats = None
            res.store = None
        return res


def read_shard(root: str, record: str, config_hash: str, inputs: list | None,
               verify: bool = True, tables: bool = True) -> RecordResult | None:
    """The record's committed result from any shard under ``root``, or None when absent,
    uncommitted, stale or corrupt.

    ``inputs`` (file, SHA-256) pairs must match the commit (None skips that check).
    ``tables=False`` leaves the beat and window tables and the stage logs on storage:
    ``res.beats`` and ``res.windows`` are None, ``res.logs`` is empty, and ``res.store`` (a
    :class:`ShardTables`) reads them on demand. (Reading many records: use one
    :class:`ShardIndex`, which reads each commit marker once.)
    """
    return ShardIndex(root).read(record, config_hash, inputs, verify, tables)


def _verified_blobs(fs, data: str, files: dict, local: bool, verify: bool) -> dict | None:
    """A record's small files as bytes, each checked against its commit digest (the local
    tensor files are hashed in chunks and left on disk); None when one is missing or differs."""
    big = ("tensor.npy", "mask.npy")
    blobs = {}
    if sorted(files) != sorted(_NAMES):
        return None
    try:
        with fs.open(data, "rb") as fh:
            for name, (offset, length, digest) in sorted(files.items(), key=lambda x: x[1][0]):
                fh.seek(int(offset))
                if local and name in big:  # hashed in chunks, then memory-mapped: bounded memory
                    if verify and _sha_stream(fh, int(length)) != digest:
                        return None
                    continue
                blobs[name] = fh.read(int(length))
                if len(blobs[name]) != int(length):
                    return None
    except (FileNotFoundError, OSError, KeyError, ValueError, TypeError):
        return None
    if verify and any(hashlib.sha256(v).hexdigest() != files[k][2] for k, v in blobs.items()):
        return None
    return blobs


def _sha_stream(fh, length: int) -> str:
    h = hashlib.sha256()
    left = length
    while left > 0:
        chunk = fh.read(min(1 << 20, left))
        if not chunk:
            break
        h.update(chunk)
        left -= len(chunk)
    return h.hexdigest() if left == 0 else ""
