"""Delimited files as recorded: compression, comment-block headers, underlines, tolerant names,
decimal commas (potfield.io.delimited), on invented files.

The compressed files are written with Python's standard gzip, bz2, lzma and zipfile modules
(independent writers of the .gz/.bz2/.xz/.zip formats); the expected values are the ones
written.
"""

from __future__ import annotations

import bz2
import gzip
import lzma
import zipfile

import numpy as np
import pytest

from potfield.errors import InputDataError
from potfield.io.delimited import read_delimited

TEXT = "X\tY\tMAG\n500000.0\t6100000.0\t56012.31\n500010.0\t6100000.0\t56012.47\n"


@pytest.mark.parametrize("suffix,opener", [(".gz", gzip.open), (".bz2", bz2.open), (".xz", lzma.open)])
def test_compressed_with_auto_delimiter(tmp_path, suffix, opener):
    path = tmp_path / f"lines.txt{suffix}"
    with opener(path, "wt") as handle:
        handle.write(TEXT)
    frame = read_delimited(path, columns={"easting": "X", "total_field": "MAG"})
    np.testing.assert_array_equal(frame["total_field"], [56012.31, 56012.47])
    assert list(frame["source_row"]) == [2, 3]


def test_zip_with_one_member_and_refused_with_two(tmp_path):
    path = tmp_path / "lines.zip"
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("lines.txt", TEXT)
    frame = read_delimited(path, columns={"total_field": "MAG"})
    assert list(frame["total_field"]) == [56012.31, 56012.47]
    with zipfile.ZipFile(path, "a") as archive:
        archive.writestr("other.txt", TEXT)
    with pytest.raises(InputDataError, match="holds 2 files, not one"):
        read_delimited(path, columns={"total_field": "MAG"})


def test_header_as_last_line_of_a_comment_block_and_underline(tmp_path):
    path = tmp_path / "line10.xyz"
    path.write_text(
        "/ invented ground magnetic survey\n"
        "/ datum WGS 84, UTM zone 54 south\n"
        "/ Fid  Line  X-Coord   Y-Coord    Mag-Total  Date        Time\n"
        "/-----------------------------------------------------------\n"
        "  101  10    500000.0  6100000.0  56012.31   01/05/2024  093015.5\n"
        "  102  10    500010.0  6100000.0  56012.47   01/05/2024  093016.5\n"
    )
    # the mapped names differ from the file's in case, dashes and underscores only
    columns = {
        "easting": "x_coord",
        "northing": "Y-Coord",
        "total_field": "MAG TOTAL",
        "date": "Date",
        "time": "Time",
        "raw_Fid": "Fid",
    }
    frame = read_delimited(path, columns=columns, comment="/")
    assert list(frame["source_row"]) == [5, 6]  # lines as a text editor numbers them
    assert list(frame["raw_Fid"]) == ["101", "102"] and list(frame["time"]) == ["093015.5", "093016.5"]
    np.testing.assert_array_equal(frame["easting"], [500000.0, 500010.0])


def test_hash_comment_header_attached_to_the_names(tmp_path):
    path = tmp_path / "lines.csv"
    path.write_text("# invented export\n#Fid,X,MAG\n1,2.0,3.5\n2,4.0,5.5\n")
    frame = read_delimited(path, columns={"easting": "X", "total_field": "MAG"}, comment="#")
    assert list(frame["total_field"]) == [3.5, 5.5] and list(frame["source_row"]) == [3, 4]
    # a comment block above an ordinary header line: the header is the first other line
    path.write_text("# invented export\n# second comment\nFid,X,MAG\n1,2.0,3.5\n")
    frame = read_delimited(path, columns={"easting": "X", "total_field": "MAG"}, comment="#")
    assert list(frame["total_field"]) == [3.5] and list(frame["source_row"]) == [4]


def test_underline_under_an_ordinary_header(tmp_path):
    path = tmp_path / "lines.csv"
    path.write_text("Fid,X,MAG\n---,----,----\n1,2.0,3.5\n")
    frame = read_delimited(path, columns={"easting": "X", "total_field": "MAG"})
    assert list(frame["total_field"]) == [3.5] and list(frame["source_row"]) == [3]


def test_decimal_commas(tmp_path):
    path = tmp_path / "base.txt"
    path.write_text("time;F;Q\n10:00:00;56012,37;1\n10:00:01;56012,40;3\n")
    frame = read_delimited(path, columns={"time": "time", "total_field": "F", "quality": "Q"}, decimal=",")
    assert list(frame["total_field"]) == [56012.37, 56012.40]
    assert list(frame["quality"]) == ["1", "3"]


def test_missing_column_names_the_file_columns(tmp_path):
    path = tmp_path / "lines.csv"
    path.write_text("/ Fid X MAG\n1 2.0 3.5\n")
    with pytest.raises(InputDataError, match="column 'TMI' .* its columns are: Fid, X, MAG"):
        read_delimited(path, columns={"total_field": "TMI"}, comment="/", delimiter="whitespace")


def test_decimal_comma_with_comma_delimiter_refused(tmp_path):
    from potfield.errors import ConfigError

    path = tmp_path / "base.csv"
    path.write_text("time,F\n10:00:00,56012\n")
    with pytest.raises(ConfigError, match="delimiter and the decimal mark are both ','"):
        read_delimited(path, columns={"total_field": "F"}, decimal=",")
