"""Readings-table files: the residual table as CSV and the per-stage cache tables (parquet).

Both are written atomically (:mod:`potfield.io.atomic`). Used by the runner
(:mod:`potfield.pipeline`) and by ``potfield report`` (:mod:`potfield.qc.report`).
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from .atomic import write_parquet

#: Text columns of the readings table held dictionary-encoded (pandas categorical, categories
#: sorted) from ingest on, in memory and in the cache: one small integer per reading instead of
#: a string (a few distinct values: file names, line names, traverse/tie).
CACHE_TEXT = ("line", "line_type", "source_file", "station", "loop")


def dictionary_encode(table: pd.DataFrame) -> pd.DataFrame:
    """``table`` with its :data:`CACHE_TEXT` columns categorical (in place; returned)."""
    for name in CACHE_TEXT:
        if name in table and not isinstance(table[name].dtype, pd.CategoricalDtype):
            table[name] = table[name].astype("category")
    return table


def write_table_csv(path: Path, table: pd.DataFrame, kind: str = "magnetic") -> Path:
    """The residual table as CSV (:func:`potfield.io.columns.write_table`: ISO 8601 UTC times,
    lower-case booleans, floats rounded to the precision of their unit)."""
    from .columns import write_table

    return write_table(path, table, kind)


def write_cache_table(path: Path, table: pd.DataFrame) -> Path:
    """A stage's readings table as parquet (row groups written piece by piece), text columns
    dictionary-encoded."""
    return write_parquet(path, dictionary_encode(table.copy(deep=False)))


def read_cache_table(path: Path) -> pd.DataFrame:
    """A table written by :func:`write_cache_table`, text columns categorical as after ingest."""
    return dictionary_encode(pd.read_parquet(path))
