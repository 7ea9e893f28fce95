"""Table rows streamed to Parquet (or held in memory), and the fixed Arrow schemas."""
from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import pandas as pd

from prep.pipeline.result import RecordResult
from prep.schema import BEAT_COLUMNS, BEAT_TYPES

log = logging.getLogger("prep")


class Rows:
    """Where consolidation puts table rows (pyarrow Tables or DataFrames), a record at a time:
    kept in memory and returned as one DataFrame by default; :class:`ParquetRows` streams them
    into a file instead."""

    def __init__(self):
        self.parts: list = []

    def add(self, rows) -> None:
        t = to_arrow(rows)
        if t.num_rows:
            self.parts.append(t)

    def finish(self, empty: pd.DataFrame) -> pd.DataFrame | None:
        import pyarrow as pa
        if not self.parts:
            return empty
        return pa.concat_tables(self.parts, promote_options="default").to_pandas()


class ParquetRows(Rows):
    """Rows written to a Parquet file in row groups of about ``group`` rows; memory holds one
    group at most. The schema is fixed by ``schema`` or by the first rows written (a column
    later rows lack is written as nulls; one they add is left out)."""

    def __init__(self, path: Path, schema=None, group: int = 65536):
        super().__init__()
        self.path, self.schema, self.group = path, schema, group
        self.writer = None
        self.n = 0

    def add(self, rows) -> None:
        t = to_arrow(rows)
        if t.num_rows:
            self.parts.append(t)
            self.n += t.num_rows
        if self.n >= self.group:
            self._flush()

    def _flush(self) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        if not self.parts:
            return
        if self.schema is None:  # an all-empty column would be typed null: make it text
            sch = pa.concat_tables(self.parts, promote_options="default").schema
            self.schema = pa.schema([f.with_type(pa.string()) if pa.types.is_null(f.type) else f
                                     for f in sch]).remove_metadata()
        table = pa.concat_tables([conform(t, self.schema) for t in self.parts])
        self.parts, self.n = [], 0
        if self.writer is None:
            self.writer = pq.ParquetWriter(self.path, self.schema, compression="zstd")
        self.writer.write_table(table)

    def finish(self, empty: pd.DataFrame) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        self._flush()
        if self.writer is None:  # no rows at all: an empty file with the columns
            pq.write_table(pa.Table.from_pandas(empty, schema=self.schema, preserve_index=False)
                           if self.schema is not None else
                           pa.Table.from_pandas(empty, preserve_index=False), self.path,
                           compression="zstd")
        else:
            self.writer.close()
        return None


def to_arrow(rows):
    """A pyarrow Table of ``rows`` (a Table already, or a DataFrame)."""
    import pyarrow as pa
    return rows if isinstance(rows, pa.Table) else pa.Table.from_pandas(rows, preserve_index=False)


def conform(t, schema):
    """Table ``t`` with exactly ``schema``'s columns, in order and cast to its types (a column
    ``t`` lacks becomes nulls)."""
    import pyarrow as pa
    have = set(t.column_names)
    return pa.Table.from_arrays([t.column(f.name).cast(f.type) if f.name in have else
                                 pa.nulls(t.num_rows, f.type) for f in schema], schema=schema)


def beats_schema():
    """The fixed Arrow schema of beats.parquet (row groups from different records must agree)."""
    import pyarrow as pa
    arrow = {"str": pa.string(), "int64": pa.int64(), "float64": pa.float64(), "bool": pa.bool_()}
    return pa.schema([(c, arrow[t]) for c, t in zip(BEAT_COLUMNS, BEAT_TYPES)] +
                     [("patient", pa.string()), ("split", pa.string())])


def beats_arrow(r: RecordResult, schema):
    """Record ``r``'s beat table as a pyarrow Table in ``schema``'s columns, less the last two
    (patient and split, added by consolidation)."""
    import pyarrow as pa
    base = pa.schema(list(schema)[:-2])
    t = None
    if r.beats is None and r.store is not None:
        t = r.store.arrow("beats")
    elif r.beats is not None and len(r.beats.columns):
        t = to_arrow(r.beats)
    return base.empty_table() if t is None else conform(t, base)


def windows_arrow(r: RecordResult):
    """Record ``r``'s window table as a pyarrow Table (None when it has none)."""
    if r.windows is None and r.store is not None:
        return r.store.arrow("windows")
    return None if r.windows is None else to_arrow(r.windows)


def columns_of(r: RecordResult, columns: list[str]) -> dict[str, np.ndarray]:
    """A few beat-table columns as arrays (from memory or from the shard, without pandas)."""
    t = beats_arrow(r, beats_schema())
    return {c: t.column(c).to_numpy(zero_copy_only=False) for c in columns}
