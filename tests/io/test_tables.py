"""The columnar cache (io/tables.py): tables put together by column from per-stage files, and
readings.csv / readings.parquet streamed from them piece by piece.

The reference for the streamed files is the whole-table writers of the same package
(io/columns.write_table, io/atomic.write_parquet): the streamed bytes must be identical.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from potfield.io.atomic import write_parquet
from potfield.io.columns import write_table
from potfield.io.tables import (
    RowCountMismatch,
    cache_float_places,
    iter_cache_pieces,
    manifest_layout,
    read_cache_columns,
    write_cache_table,
    write_readings,
)


def _whole(n: int = 2_500) -> pd.DataFrame:
    """An invented readings table: times, categorical text, known and unknown float columns,
    flags, integers, plain text."""
    rng = np.random.default_rng(3)
    line = np.repeat([f"L{k:03d}" for k in range(n // 100 + 1)], 100)[:n]
    frame = pd.DataFrame(
        {
            "time": pd.date_range("2025-03-03", periods=n, freq="100ms").astype("datetime64[ns]"),
            "easting": rng.uniform(4e5, 4.1e5, n),
            "line": pd.Categorical(line),
            "line_type": pd.Categorical(np.where(np.arange(n) % 7 == 0, "tie", "traverse")),
            "source_row": np.arange(2, n + 2),
            "raw_note": [f"n{k % 5}" for k in range(n)],
        }
    )
    frame["total_field"] = 50_000 + rng.normal(0, 30, n)
    frame["flag_spike"] = rng.random(n) < 0.01
    # an unknown float column: rounded to 10 significant digits of the whole column's largest
    # value, which sits in the last piece only
    frame["mystery"] = np.r_[rng.normal(0, 1e-3, n - 1), 12345.678901234]
    frame.loc[5, "total_field"] = np.nan
    return frame


def _split(frame: pd.DataFrame, tmp_path, chunk_rows=None) -> dict:
    """Two 'stages': ingest wrote the first six columns, clean the rest (as the runner does)."""
    stages = {
        "ingest": {"status": "done", "columns_added": list(frame.columns[:6])},
        "clean": {"status": "done", "columns_added": list(frame.columns[6:])},
        "diurnal": {"status": "stale", "columns_added": ["diurnal"]},  # not current: left out
    }
    for name in ("ingest", "clean"):
        columns = stages[name]["columns_added"]
        table = frame[columns]
        if chunk_rows:
            write_parquet(tmp_path / f"{name}.parquet", table, chunk_rows=chunk_rows)
        else:
            write_cache_table(tmp_path / f"{name}.parquet", table)
    return manifest_layout(tmp_path, stages, ["ingest", "clean", "diurnal"])


def test_layout_follows_the_manifest_and_reads_only_the_wanted_columns(tmp_path):
    frame = _whole()
    layout = _split(frame, tmp_path)
    assert list(layout) == list(frame.columns)  # stale stages are not part of the table
    assert layout["flag_spike"].name == "clean.parquet"
    part = read_cache_columns(layout, ["flag_spike", "line", "easting"])
    assert list(part.columns) == ["flag_spike", "line", "easting"]
    assert isinstance(part["line"].dtype, pd.CategoricalDtype)
    pd.testing.assert_frame_equal(part, frame[["flag_spike", "line", "easting"]], check_categorical=False)
    empty = read_cache_columns(layout, [])
    assert empty.shape == (len(frame), 0)


def test_files_of_different_lengths_are_refused(tmp_path):
    frame = _whole(300)
    layout = _split(frame, tmp_path)
    write_cache_table(tmp_path / "clean.parquet", frame[list(frame.columns[6:])].iloc[:-1])
    with pytest.raises(RowCountMismatch, match="different numbers of rows"):
        read_cache_columns(layout, ["easting"])


@pytest.mark.parametrize("chunk_rows", [300, 1_000_000])
def test_streamed_readings_equal_the_whole_table_files(tmp_path, chunk_rows):
    frame = _whole()
    layout = _split(frame, tmp_path, chunk_rows=700)  # row groups unlike the pieces read
    # the pieces are the whole table, every piece with the whole column's categories
    pieces = list(iter_cache_pieces(layout, chunk_rows))
    assert len(pieces) == -(-len(frame) // chunk_rows)
    pd.testing.assert_frame_equal(pd.concat(pieces), frame)
    assert cache_float_places(layout, "magnetic") == {"easting": 2, "total_field": 3, "mystery": 5}
    write_readings(tmp_path / "r.csv", tmp_path / "r.parquet", layout, "magnetic", chunk_rows=chunk_rows)
    write_table(tmp_path / "whole.csv", frame, "magnetic", chunk_rows=chunk_rows)
    write_parquet(tmp_path / "whole.parquet", frame, chunk_rows=chunk_rows)
    assert (tmp_path / "r.csv").read_bytes() == (tmp_path / "whole.csv").read_bytes()
    assert (tmp_path / "r.parquet").read_bytes() == (tmp_path / "whole.parquet").read_bytes()
    assert pq.ParquetFile(tmp_path / "r.parquet").num_row_groups == len(pieces)
    # the unknown column kept 10 significant digits of its largest value (in the last piece)
    text = (tmp_path / "r.csv").read_text().splitlines()
    assert text[-1].split(",")[-1] == "12345.6789"  # 12345.678901234 to 5 decimals
