"""The column registry and the table writer: data dictionary, ISO 8601 times, rounding."""

from __future__ import annotations

import numpy as np
import pandas as pd

from potfield.io.columns import describe, format_table, write_data_dictionary, write_table


def test_times_are_iso_8601_utc_with_milliseconds(tmp_path):
    # ISO 8601-1:2019 extended format, "Z" = UTC; a time-zone-aware input is converted to UTC
    frame = pd.DataFrame(
        {
            "time": pd.to_datetime(["2025-03-03T22:28:40.123456", None]),
            "start": pd.to_datetime(["2025-03-04T08:00:00+10:00"] * 2),
        }
    )
    path = write_table(tmp_path / "t.csv", frame)
    lines = path.read_text().splitlines()
    assert lines[1].split(",") == ['"2025-03-03T22:28:40.123Z"', '"2025-03-03T22:00:00.000Z"']
    assert lines[2].split(",")[0] == ""  # missing time: empty field, never NaT


def test_booleans_lower_case_and_floats_rounded_by_unit(tmp_path):
    frame = pd.DataFrame(
        {
            "flag_spike": [True, False],
            "total_field": [57086.80712345678, 1.0],
            "bouguer_anomaly": [-20.19605035556067, 0.0],
            "longitude": [145.56632112345678, 0.0],
            "easting": [365218.2996690122, 0.0],
            "drift_residual": [-4.3e-9, 1.0],
            "something_new": [1 / 3, 2.0],
        }
    )
    text = write_table(tmp_path / "t.csv", frame, "gravity").read_text().splitlines()
    header = text[0].replace('"', "").split(",")
    row = dict(zip(header, text[1].split(",")))
    assert row["flag_spike"] == "true" and text[2].split(",")[0] == "false"
    assert row["total_field"] == "57086.807"  # nT to 3 decimals (common practice)
    assert row["bouguer_anomaly"] == "-20.1961"  # mGal to 4 decimals (common practice)
    assert row["longitude"] == "145.5663211"  # degrees to 7 decimals, about 1 cm (common practice)
    assert row["easting"] == "365218.3"  # metres to 2 decimals
    assert row["drift_residual"] == "0"  # no "-0"
    assert row["something_new"] == "0.333333333"  # unknown: 10 significant digits of the column maximum


def test_data_dictionary_describes_every_column(tmp_path):
    write_table(
        tmp_path / "readings.csv",
        pd.DataFrame(
            {
                "time": pd.to_datetime(["2025-01-01"]),
                "bouguer_anomaly": [1.0],
                "flag_spike": [False],
                "grid_residual": [0.1],
            }
        ),
        "gravity",
    )
    path = write_data_dictionary(tmp_path, "gravity")
    table = pd.read_csv(path)
    assert list(table.columns) == ["table", "name", "unit", "meaning", "stage"]
    rows = table.set_index("name")
    assert rows.loc["bouguer_anomaly", "unit"] == "mGal"
    assert rows.loc["grid_residual", "unit"] == "mGal"  # the field unit follows the survey kind
    assert rows.loc["flag_spike", "stage"] == "clean"
    assert not (table["meaning"] == "not described yet").any()
    assert describe("grid_residual", "magnetic")[0] == "nT"
    assert describe("no_such_column")[1] == "not described yet"


def test_format_keeps_text_and_integers():
    frame = pd.DataFrame({"line": ["1010"], "source_row": np.array([5], dtype=np.int64)})
    out = format_table(frame)
    assert out["line"].iat[0] == "1010" and out["source_row"].iat[0] == 5


def _mixed_table(n: int = 2_500) -> pd.DataFrame:
    rng = np.random.default_rng(3)
    line = np.repeat([f"L{k}" for k in range(5)], n // 5)
    return pd.DataFrame(
        {
            "time": pd.date_range("2025-03-03", periods=n, freq="1s"),
            "total_field": rng.normal(57_000.0, 30.0, n),
            # an unregistered column: 10 significant digits of the largest value of the column,
            # which sits in the last piece only
            "extra": np.r_[rng.normal(0.0, 1.0, n - 1), 12_345.678901234],
            "line": pd.Categorical(line),
            "source_file": pd.Categorical(["a.csv"] * n),
            "flag_spike": rng.random(n) > 0.9,
            "source_row": np.arange(n) + 2,
        }
    )


def test_table_written_in_pieces_is_the_text_of_one_pyarrow_write(tmp_path):
    # reference: the same table formatted whole and written by one pyarrow.csv.write_csv call
    # (independent library); the piecewise writer must give the same bytes, categorical text
    # columns included
    import pyarrow as pa
    import pyarrow.csv as pacsv

    frame = _mixed_table()
    pieces = write_table(tmp_path / "pieces.csv", frame, chunk_rows=300)
    whole = tmp_path / "whole.csv"
    plain = frame.assign(line=frame["line"].astype(str), source_file=frame["source_file"].astype(str))
    arrow = pa.Table.from_pandas(format_table(plain), preserve_index=False)
    pacsv.write_csv(arrow, whole, pacsv.WriteOptions(quoting_style="needed"))
    assert pieces.read_bytes() == whole.read_bytes()
    assert pieces.read_text().count("\n") == len(frame) + 1


def test_parquet_written_in_pieces_reads_back_as_pandas_wrote_it(tmp_path):
    # reference: pandas.DataFrame.to_parquet of the whole table (pyarrow engine)
    from potfield.io.atomic import write_parquet

    frame = _mixed_table()
    frame.to_parquet(tmp_path / "whole.parquet", index=False)
    write_parquet(tmp_path / "pieces.parquet", frame, chunk_rows=300)
    pieces = pd.read_parquet(tmp_path / "pieces.parquet")
    pd.testing.assert_frame_equal(pieces, pd.read_parquet(tmp_path / "whole.parquet"))
    import pyarrow.parquet as pq

    assert pq.ParquetFile(tmp_path / "pieces.parquet").num_row_groups == 9  # ceil(2500 / 300)
