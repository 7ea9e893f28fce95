"""What every reader shares: file hashing and the sampling-rate check (one message style)."""
from __future__ import annotations

import hashlib
from pathlib import Path

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
