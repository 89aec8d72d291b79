"""IAGA-2002 reader/writer and the observatory table.

Layout facts are from the published format description (IAGA Working Group V-DAT, "IAGA-2002
Data Exchange Format", as distributed by INTERMAGNET and NOAA-NCEI): 70-character records,
label from column 2, value from column 25, '|' in column 70, data records
"YYYY-MM-DD hh:mm:ss.sss DDD" + four %10.2f values, D in minutes of arc, 99999 missing and
88888 not recorded.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from potfield.errors import InputDataError, PotfieldError
from potfield.io.iaga2002 import looks_like_iaga2002, observatory_table, read_iaga2002, write_iaga2002

# A file written by hand following the format description (see the module docstring): HDZF
# elements, D in minutes of arc, a comment, one missing (99999.00) and one not-recorded (88888.00).
HAND = [
    " Format                 IAGA-2002                                    |",
    " Source of Data         Test Geomagnetic Service                     |",
    " Station Name           Testville                                    |",
    " IAGA CODE              TST                                          |",
    " Geodetic Latitude      40.137                                       |",
    " Geodetic Longitude     254.763                                      |",
    " Elevation              1682                                         |",
    " Reported               HDZF                                         |",
    " Sensor Orientation     HDZF                                         |",
    " Digital Sampling       0.01 second                                  |",
    " Data Interval Type     Filtered 1-Minute (00:15-01:45)              |",
    " Data Type              Provisional                                  |",
    " # A hand-written test file.                                         |",
    "DATE       TIME         DOY     TSTH      TSTD      TSTZ      TSTF   |",
    "2003-04-11 00:00:00.000 101     20000.00    600.00  47000.00  51092.02",
    "2003-04-11 00:01:00.000 101     20001.50    600.30  47000.20  51092.80",
    "2003-04-11 00:02:00.000 101     99999.00  99999.00  99999.00  99999.00",
    "2003-04-11 00:03:00.000 101     20002.00    599.70  47001.00  88888.00",
]


def _write(tmp_path, lines, name="tst20030411vmin.min"):
    path = tmp_path / name
    path.write_text("\n".join(lines) + "\n", encoding="ascii")
    return path


def test_hand_written_file_follows_the_layout(tmp_path):
    # The fixture itself obeys the format description: every record is 70 characters.
    assert all(len(line) == 70 for line in HAND)
    record = read_iaga2002(_write(tmp_path, HAND))
    assert record.code == "TST"
    assert record.elements == "HDZF"
    assert record.header["latitude"] == pytest.approx(40.137)
    assert record.header["longitude"] == pytest.approx(254.763)
    assert record.header["elevation"] == pytest.approx(1682.0)
    assert record.header["interval_type"] == "Filtered 1-Minute (00:15-01:45)"
    assert record.header["data_type"] == "Provisional"
    assert record.comments == ["A hand-written test file."]
    data = record.data
    assert data["time"].dtype == "datetime64[ns]"
    assert data["time"].iloc[3] == pd.Timestamp("2003-04-11 00:03:00")
    # D is given in minutes of arc (format description): 600' = 10 degrees.
    assert data["D"].iloc[0] == pytest.approx(600.0)
    assert data["declination_deg"].iloc[0] == pytest.approx(10.0)
    # X = H cos D, Y = H sin D (definitions of the elements; Chapman and Bartels 1940, ch. 1),
    # hand computed: 20000 cos 10 deg = 19696.155, 20000 sin 10 deg = 3472.964.
    assert data["mag_north"].iloc[0] == pytest.approx(19696.155, abs=1e-3)
    assert data["mag_east"].iloc[0] == pytest.approx(3472.964, abs=1e-3)
    assert data["mag_down"].iloc[0] == pytest.approx(47000.0)
    assert data["total_field"].iloc[0] == pytest.approx(51092.02)
    # 99999 = missing, 88888 = not recorded (format description): both NaN.
    assert data.iloc[2][["H", "D", "Z", "F", "mag_north"]].isna().all()
    assert np.isnan(data["F"].iloc[3]) and np.isfinite(data["H"].iloc[3])
    # line numbers of the data records (header 14 lines)
    assert record.rows.tolist() == [15, 16, 17, 18]


def test_label_case_variants_fewer_headers_and_publication_date(tmp_path):
    lines = [
        HAND[0].replace("Format", "FORMAT"),
        HAND[3].replace("IAGA CODE", "Iaga Code"),
        HAND[4].replace("Geodetic Latitude", "geodetic latitude"),
        HAND[5],
        HAND[7],
        " Publication Date       2003-05-01                                   |",
        HAND[13],
        *HAND[14:16],
    ]
    record = read_iaga2002(_write(tmp_path, lines))
    assert record.code == "TST"
    assert record.header["latitude"] == pytest.approx(40.137)
    assert record.header["publication_date"] == "2003-05-01"
    assert "sensor_orientation" not in record.header
    assert len(record.data) == 2


def test_malformed_header_names_the_line(tmp_path):
    lines = list(HAND)
    lines[4] = lines[4][:-1]  # '|' missing in column 70 of line 5
    with pytest.raises(InputDataError, match=r"tst20030411vmin\.min.*line 5.*'\|'"):
        read_iaga2002(_write(tmp_path, lines))


def test_bad_header_number_names_the_line(tmp_path):
    lines = list(HAND)
    lines[4] = " Geodetic Latitude      forty                                        |"
    with pytest.raises(InputDataError, match=r"line 5: Geodetic Latitude 'forty' is not a number"):
        read_iaga2002(_write(tmp_path, lines))


@pytest.mark.parametrize(
    "bad, expected",
    [
        ("2003-04-11 00:04:00.000 101     20000.00    600.00  47000.00", r"line 17: .*fewer than"),
        (
            "2003-04-11 00:04:00.000 101     20000.00    600.00  47000.00  51092.02  1.00",
            r"line 17: .*more than",
        ),
        (
            "2003-04-11 25:04:00.000 101     20000.00    600.00  47000.00  51092.02",
            r"line 17: cannot read date",
        ),
        (
            "2003-04-11 00:04:00.000 102     20000.00    600.00  47000.00  51092.02",
            r"line 17: day of year '102'.*expected 101",
        ),
        (
            "2003-04-11 00:04:00.000 101     20000.00    abc.de  47000.00  51092.02",
            r"line 17: value 'abc.de' of TSTD",
        ),
    ],
)
def test_malformed_data_record_names_the_line(tmp_path, bad, expected):
    lines = [*HAND[:16], bad]
    with pytest.raises(InputDataError, match=expected):
        read_iaga2002(_write(tmp_path, lines))


def test_missing_data_header_and_empty_file(tmp_path):
    with pytest.raises(InputDataError, match="no data header"):
        read_iaga2002(_write(tmp_path, HAND[:13]))
    with pytest.raises(InputDataError, match="empty"):
        read_iaga2002(_write(tmp_path, [""]))
    with pytest.raises(InputDataError, match="exactly four labels"):
        read_iaga2002(
            _write(
                tmp_path,
                [*HAND[:13], "DATE       TIME         DOY     TSTH      TSTD      TSTZ   |", HAND[14][:-10]],
            )
        )
    # every such message is a single line (the CLI prints it as is)
    try:
        read_iaga2002(_write(tmp_path, HAND[:13]))
    except PotfieldError as err:
        assert "\n" not in str(err)


def _field(n=90, seed=0):
    rng = np.random.default_rng(seed)
    time = pd.date_range("2024-02-28 23:59:00", periods=n, freq="1s")  # crosses midnight, leap year
    north = 20000 + np.cumsum(rng.normal(0, 0.3, n))
    east = 1500 + np.cumsum(rng.normal(0, 0.3, n))
    down = 45000 + np.cumsum(rng.normal(0, 0.3, n))
    total = np.sqrt(north**2 + east**2 + down**2) - 1.3  # scalar F 1.3 nT below vector F
    return pd.DataFrame(
        {"time": time, "mag_north": north, "mag_east": east, "mag_down": down, "total_field": total}
    )


HEADER = {
    "iaga_code": "ABC",
    "station_name": "Test",
    "latitude": 40.0,
    "longitude": -105.2,
    "elevation": 1600.0,
    "source": "potfield test",
    "interval_type": "1-second",
    "data_type": "variation",
    "sensor_orientation": "HDZF",
    "digital_sampling": "0.1 second",
}


@pytest.mark.parametrize("elements", ["XYZF", "HDZF", "XYZG", "DHZF", "HDZG"])
def test_round_trip_every_element_set(tmp_path, elements):
    frame = _field()
    frame.loc[5, ["mag_north", "mag_east", "mag_down", "total_field"]] = np.nan
    path = write_iaga2002(tmp_path / "abc.sec", frame, {**HEADER, "reported": elements})
    text = path.read_text().splitlines()
    head = [line for line in text if not line[:1].isdigit()]
    body = [line for line in text if line[:1].isdigit()]
    # format description: header, comment and data-header records are 70 characters ending '|'
    assert all(len(line) == 70 and line.endswith("|") for line in head)
    assert head[-1].startswith("DATE       TIME         DOY     ABC" + elements[0])
    # data records: date, time, day of year, then exactly four %10.2f values (70 characters)
    pattern = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d\.\d{3} \d{3}   (.{10}){4}$")
    assert all(pattern.match(line) for line in body)
    # day of year: 28 Feb = 059, 29 Feb 2024 (leap year) = 060 (hand computed)
    assert body[0].startswith("2024-02-28 23:59:00.000 059")
    assert body[-1].startswith("2024-02-29 00:00:29.000 060")
    assert body[5].endswith("  99999.00  99999.00  99999.00  99999.00")
    record = read_iaga2002(path)
    assert record.elements == elements
    assert record.header["longitude"] == pytest.approx(254.8)  # written 0-360
    # D and I are in minutes of arc, rounded to 0.01': 0.01' at H = 20000 nT is 0.06 nT.
    tol = 0.1 if ("D" in elements or "I" in elements) else 0.006
    for name in ("mag_north", "mag_east", "mag_down", "total_field"):
        got, want = record.data[name].to_numpy(), frame[name].to_numpy()
        assert np.isnan(got[5])
        np.testing.assert_allclose(np.delete(got, 5), np.delete(want, 5), atol=tol)
    assert (record.data["time"].to_numpy() == frame["time"].to_numpy()).all()


def test_round_trip_record_is_exact(tmp_path):
    first = read_iaga2002(_write(tmp_path, HAND))
    again = read_iaga2002(write_iaga2002(tmp_path / "copy.min", first))
    assert again.header == first.header and again.comments == first.comments
    pd.testing.assert_frame_equal(again.data, first.data)
    # identical to the hand-written file (same layout rules), except that "not recorded"
    # (88888) is read as NaN and NaN is written as missing (99999.00)
    expected = HAND[:-1] + [HAND[-1].replace("88888.00", "99999.00")]
    assert (tmp_path / "copy.min").read_text().splitlines() == expected


def test_g_means_vector_minus_scalar(tmp_path):
    # G = Delta F = F(vector) - F(scalar) (IAGA-2002 description, from memory; INTERMAGNET manual)
    lines = [
        *HAND[:3],
        HAND[3],
        *HAND[4:7],
        " Reported               XYZG                                         |",
        *HAND[8:13],
        "DATE       TIME         DOY     TSTX      TSTY      TSTZ      TSTG   |",
        "2003-04-11 00:00:00.000 101     30000.00      0.00  40000.00      2.00",
    ]
    record = read_iaga2002(_write(tmp_path, lines))
    assert record.data["total_field"].iloc[0] == pytest.approx(50000.0 - 2.0)  # hypot = 50000


def test_observatory_table(tmp_path):
    a = write_iaga2002(tmp_path / "abc.sec", _field(30), {**HEADER, "reported": "XYZF"})
    b = write_iaga2002(
        tmp_path / "xyz.sec",
        _field(20, 1),
        {**HEADER, "iaga_code": "XYZ", "longitude": 10.5, "reported": "XYZF"},
    )
    table = observatory_table([b, a])
    assert list(table.columns[:2]) == ["line", "station"]
    for name in (
        "time",
        "longitude",
        "latitude",
        "height",
        "mag_north",
        "mag_east",
        "mag_down",
        "total_field",
        "source_file",
        "source_row",
    ):
        assert name in table
    assert table["line"].tolist() == ["ABC"] * 30 + ["XYZ"] * 20
    assert (table["line"] == table["station"]).all()
    assert table.groupby("line")["time"].apply(lambda t: t.is_monotonic_increasing).all()
    assert table.loc[0, "longitude"] == pytest.approx(-105.2)  # 254.8 -> -105.2
    assert table.loc[30, "longitude"] == pytest.approx(10.5)
    assert table.loc[0, "height"] == pytest.approx(1600.0)
    assert table.loc[0, "source_file"] == "abc.sec" and table.loc[0, "source_row"] == 14
    assert looks_like_iaga2002(a) and not looks_like_iaga2002(tmp_path / "nothing")


def test_writer_needs_code_and_elements(tmp_path):
    with pytest.raises(InputDataError, match="IAGA code"):
        write_iaga2002(tmp_path / "x.min", _field(3), {"reported": "XYZF"})
    with pytest.raises(InputDataError, match="four element letters"):
        write_iaga2002(tmp_path / "x.min", _field(3), {"iaga_code": "ABC", "reported": "XYQ"})
    assert not (tmp_path / "x.min").exists()
