"""Readings-table files: the residual table as CSV and the per-stage cache tables (parquet).

Both are written atomically (:mod:`potfield.io.atomic`). Used by the runner
(:mod:`potfield.pipeline`) and by ``potfield report`` (:mod:`potfield.qc.report`).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from .atomic import write_parquet

#: Text columns stored dictionary-encoded in the cache (fast to write), restored as object.
CACHE_TEXT = ("line", "line_type", "source_file", "station", "loop")


def write_table_csv(path: Path, table: pd.DataFrame, kind: str = "magnetic") -> Path:
    """The residual table as CSV (:func:`potfield.io.columns.write_table`: ISO 8601 UTC times,
    lower-case booleans, floats rounded to the precision of their unit)."""
    from .columns import write_table

    return write_table(path, table, kind)


def write_cache_table(path: Path, table: pd.DataFrame) -> Path:
    """A stage's readings table as parquet, text columns dictionary-encoded."""
    frame = table.copy(deep=False)
    for name in CACHE_TEXT:
        if name in frame and frame[name].dtype == object:
            frame[name] = frame[name].astype("category")
    return write_parquet(path, frame)


def read_cache_table(path: Path) -> pd.DataFrame:
    """A table written by :func:`write_cache_table`, text columns back as object."""
    table = pd.read_parquet(path)
    for name in CACHE_TEXT:
        if name in table and isinstance(table[name].dtype, pd.CategoricalDtype):
            table[name] = table[name].astype(object)
    return table
