"""A dataset folder's file names and the beat table's columns and types, in one place (writers,
readers, checks and the report use it).

Meanings of every column: docs/outputs.md (a test keeps the page in step with the files).
"""
from __future__ import annotations

import pandas as pd

#: the files of a dataset folder
BEATS_NPY = "beats.npy"              # (n_kept, n_leads, n_samples) float32, normalized
LEAD_MASK_NPY = "lead_mask.npy"      # (n_kept, n_leads) bool
NORM_CENTER_NPY = "norm_center.npy"  # (n_kept, n_leads) float32
NORM_SCALE_NPY = "norm_scale.npy"    # (n_kept, n_leads) float32
BEATS_TABLE = "beats.parquet"        # one row per detected beat
LEADS_TABLE = "leads.parquet"        # one row per record and lead
RECORDS_TABLE = "records.parquet"    # one row per record
WINDOWS_TABLE = "windows.parquet"    # one row per record, lead and quality window
MANIFEST = "manifest.json"           # provenance, written last, with every file's SHA-256
REPORT = "report.html"               # beatmill report (not part of the dataset's checksums)
TENSOR_FILES = (BEATS_NPY, LEAD_MASK_NPY, NORM_CENTER_NPY, NORM_SCALE_NPY)
TABLE_FILES = (BEATS_TABLE, LEADS_TABLE, RECORDS_TABLE, WINDOWS_TABLE)

#: beats.parquet columns written per record, in order, with their pandas/Arrow types
#: (consolidation adds ``patient`` and ``split``)
BEATS: list[tuple[str, str]] = [
    ("beat_id", "str"), ("record", "str"), ("r_sample", "int64"), ("r_time_s", "float64"),
    ("rr_prev_s", "float64"), ("rr_next_s", "float64"), ("included", "bool"),
    ("is_beat", "bool"), ("reasons", "str"), ("tensor_index", "int64"), ("beat_flags", "str"),
    ("label", "str"), ("beat_class", "str"), ("rhythm", "str"), ("detect_conf", "float64"),
    ("n_leads_seen", "int64"), ("template_corr", "float64"), ("qrs_match", "float64"),
    ("hf_ratio", "float64"), ("bad_fraction", "float64"), ("amplitude_z", "float64"),
    ("window_grade", "str"), ("second_detector", "bool"),
]
BEAT_COLUMNS = [c for c, _ in BEATS]
BEAT_TYPES = [t for _, t in BEATS]


def empty_beats() -> pd.DataFrame:
    """A beat table with every column and no row.

    >>> list(empty_beats().columns) == BEAT_COLUMNS
    True
    """
    return pd.DataFrame({c: pd.Series(dtype=t) for c, t in BEATS})
