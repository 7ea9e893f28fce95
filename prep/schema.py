"""The beat table's columns and their types, in one place (writers, readers and checks use it).

Meanings of every column: docs/outputs.md (a test keeps the page in step with the files).
"""
from __future__ import annotations

import pandas as pd

#: beats.parquet columns written per record, in order, with their pandas/Arrow types
#: (consolidation adds ``patient`` and ``split``)
BEATS: list[tuple[str, str]] = [
    ("beat_id", "str"), ("record", "str"), ("r_sample", "int64"), ("r_time_s", "float64"),
    ("rr_prev_s", "float64"), ("rr_next_s", "float64"), ("included", "bool"),
    ("is_beat", "bool"), ("reasons", "str"), ("tensor_index", "int64"), ("flags", "str"),
    ("label", "str"), ("class", "str"), ("rhythm", "str"), ("detect_conf", "float64"),
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
