"""What every reader shares: the :class:`Format` a reader registers, file hashing, the
annotation CSV name and the sampling-rate check (one message style)."""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from prep.errors import RecordError

MIN_FS_HZ = 50.0       # below this the QRS band (5-20 Hz) and its slopes are not resolved
MAX_FS_HZ = 100_000.0  # beyond this a rate is not believable for ECG


def check_rate(fs: float, shown: str) -> None:
    """Raise :class:`RecordError` naming ``shown`` unless ``fs`` is a usable ECG rate.

    >>> check_rate(360.0, "100.hea")
    """
    if not np.isfinite(fs) or not MIN_FS_HZ <= fs <= MAX_FS_HZ:
        raise RecordError(f"sampling rate {fs:g} Hz is not usable (ECG needs {MIN_FS_HZ:g} to "
                          f"{MAX_FS_HZ:g} Hz); fix the rate field or pass the right --fs",
                          path=shown, stage="read")


def sha256_file(path: Path) -> str:
    """SHA-256 of a file, read in 1 MiB pieces."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def hashed(files: list[Path]) -> list[tuple[str, str]]:
    """(file name, SHA-256) of each file, in the order given."""
    return [(f.name, sha256_file(f)) for f in files]


def annotation_csv(base: Path) -> Path:
    """Where a record's reference annotations may come as CSV: ``<base>.annotations.csv``."""
    return Path(str(base) + ".annotations.csv")


@dataclass(frozen=True)
class Format:
    """What one input format tells the rest of beatmill (one module per format registers one;
    see :data:`prep.io.sources.FORMATS`).

    ``read(path, cfg, *, name, inputs, sampfrom=0, sampto=None)`` returns a
    :class:`prep.model.Record` (``sampfrom``/``sampto`` only where ``length`` gives a length;
    others raise ``ValueError`` for a stretch). ``files(path, cfg)``: every file the record is
    read from, for checksums, without decoding it. ``length(path)``: (samples, rate) from the
    header, (0, 0.0) when the record is read whole. ``leads(path, cfg)``: its canonical ECG
    leads, from the header where possible. ``record_path``: the file found -> the record's path
    (WFDB: the base name without ``.hea``); ``record_name``: that path -> the record's name;
    ``not_records``: of the record paths found, those that are parts of another record.
    """

    kind: str
    suffixes: tuple[str, ...]  # lower-case; a folder scan matches them in any case
    read: Callable
    files: Callable
    length: Callable
    leads: Callable
    record_path: Callable[[Path], Path] = lambda p: p
    record_name: Callable[[Path], str] = lambda p: p.stem
    not_records: Callable[[list[Path]], set[Path]] = lambda paths: set()
