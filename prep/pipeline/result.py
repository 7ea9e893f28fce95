"""What processing one record gives: :class:`RecordResult` (tables, tensor, logs), and the
seam through which its tables may wait on storage instead of in memory."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
import pandas as pd

from prep.model import StageLog


class StoredTables(Protocol):
    """Where a result's tables wait outside memory (for example a shard, see
    :class:`prep.dataset.shards.ShardTables`): read one table when it is needed."""

    n_rows: dict            # table name -> rows
    kept: dict | None       # summary of kept beats per class, when written with the tables

    def arrow(self, name: str): ...          # one table as a pyarrow Table

    def stages(self) -> list[dict]: ...      # the record's stage logs


@dataclass
class RecordResult:
    """Everything one record contributes to a dataset (beats not yet normalized)."""

    name: str
    status: str                      # ok / failed / no_usable_lead
    error: str = ""
    fs: float = float("nan")
    duration_s: float = float("nan")
    n_leads: int = 0
    inputs: list = field(default_factory=list)
    beats: pd.DataFrame | None = None          # one row per detected beat
    tensor: np.ndarray | None = None           # (n_kept, n_axis, n_samples), mV, time order
    mask: np.ndarray | None = None             # (n_kept, n_axis) bool
    leads: list[dict] = field(default_factory=list)
    logs: list[StageLog] = field(default_factory=list)
    comments: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    windows: pd.DataFrame | None = None        # one row per lead and quality window
    class_yield: dict = field(default_factory=dict)  # class -> reference / detected / kept
    store: "StoredTables | None" = None          # tables left on storage (a shard), read on demand

    @property
    def n_beats(self) -> int:
        if self.beats is None and self.store is not None:
            return int(self.store.n_rows.get("beats") or 0)
        return 0 if self.beats is None else len(self.beats)

    @property
    def n_kept(self) -> int:
        return 0 if self.tensor is None else int(self.tensor.shape[0])
