"""Readings-table files: the residual table as CSV and the per-stage cache tables (parquet).

Both are written atomically (:mod:`potfield.io.atomic`). Used by the runner
(:mod:`potfield.pipeline`) and by ``potfield report`` (:mod:`potfield.qc.report`).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from .atomic import atomic_path, write_parquet

#: Text columns stored dictionary-encoded in the cache (fast to write), restored as object.
CACHE_TEXT = ("line", "line_type", "source_file", "station", "loop")


def write_table_csv(path: Path, table: pd.DataFrame) -> Path:
    """The residual table as CSV: pyarrow's writer (fast), ISO 8601 UTC times."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.csv as pacsv

    arrow = pa.Table.from_pandas(table, preserve_index=False)
    if "time" in arrow.column_names:
        index = arrow.column_names.index("time")
        text = pc.strftime(arrow.column(index), format="%Y-%m-%dT%H:%M:%SZ")
        arrow = arrow.set_column(index, "time", text)
    with atomic_path(path) as tmp:
        pacsv.write_csv(arrow, tmp)
    return path


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
