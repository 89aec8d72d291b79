"""ASEG-GDF2 reader on an invented .des/.dat pair written in the standard's layout.

Layout: ASEG-GDF2 standard, Revision 4 (ASEG 2004; DEFN records "DEFN n ST=RECD,RT=;LABEL:
FORMAT:ATTRIBUTES", Fortran formats An/In/Fw.d, NULL/UNITS/NAME attributes; from memory of the
standard's text). The data lines are written here with Python's %-formatting of the same
Fortran widths, independently of the reader's column arithmetic.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from potfield.errors import InputDataError
from potfield.io.gdf2 import read_descriptor, read_gdf2

DES = """\
DEFN   ST=RECD,RT=COMM;RT:A4;COMMENTS:A76
DEFN 1 ST=RECD,RT=;FID:F10.1:UNITS=s,NULL=-9999999.9,NAME=fiducial
DEFN 2 ST=RECD,RT=;LINE:I8:NAME=line number
DEFN 3 ST=RECD,RT=;DATE:I9:NAME=date YYYYMMDD
DEFN 4 ST=RECD,RT=;TIME:F10.2:UNITS=s,NAME=seconds of day
DEFN 5 ST=RECD,RT=;LON:F12.6:UNITS=deg,NULL=-999.000000
DEFN 6 ST=RECD,RT=;LAT:F11.6:UNITS=deg,NULL=-99.000000
DEFN 7 ST=RECD,RT=;ALT:F8.1:UNITS=ft,NULL=-9999.9,NAME=sensor height
DEFN 8 ST=RECD,RT=;MAG:F11.3:UNITS=nanotesla,NULL=-99999.999,NAME=total field
DEFN 9 ST=RECD,RT=;GRAD:2E12.4:UNITS=nT/m,NAME=two gradients
DEFN 10 ST=RECD,RT=;CODE:A4:NAME=quality code
DEFN 11 ST=RECD,RT=;END DEFN
"""

RECORDS = [
    (1000.0, 10, 20240501, 36000.0, 138.5, -34.9, 328.1, 56000.125, 0.0012, -0.0034, "OK"),
    (1000.1, 10, 20240501, 36000.1, 138.500123, -34.9, -9999.9, -99999.999, 0.0011, -0.0031, "BAD"),
    (1000.2, 10, 20240501, 36000.2, 138.500246, -34.9, 330.0, 56000.5, 0.0010, -0.0030, "OK"),
]


def _write(folder: Path, records=RECORDS, des: str = DES) -> Path:
    lines = ["COMM invented survey for a test, not real data"]
    for r in records:
        lines.append("%10.1f%8d%9d%10.2f%12.6f%11.6f%8.1f%11.3f%12.4E%12.4E%4s" % r)  # noqa: UP031 (Fortran-like widths)
    (folder / "survey.des").write_text(des)
    dat = folder / "survey.dat"
    dat.write_text("\n".join(lines) + "\n")
    return dat


COLUMNS = {
    "time": "TIME",
    "date": "DATE",
    "line": "LINE",
    "longitude": "LON",
    "latitude": "LAT",
    "height": "ALT",
    "total_field": "MAG",
    "raw_CODE": "CODE",
    "raw_GRAD_2": "GRAD_2",
}


def test_descriptor_layout(tmp_path):
    _write(tmp_path)
    layout = read_descriptor(tmp_path / "survey.des")
    labels = [f.label for f in layout.fields]
    # ASEG-GDF2: fields follow one another in DEFN order; 2E12.4 is an array of two
    assert labels == ["FID", "LINE", "DATE", "TIME", "LON", "LAT", "ALT", "MAG", "GRAD_1", "GRAD_2", "CODE"]
    starts = np.cumsum([0, 10, 8, 9, 10, 12, 11, 8, 11, 12, 12])
    assert [f.start for f in layout.fields] == list(starts)
    assert layout.get("ALT").units == "ft" and layout.get("MAG").null == "-99999.999"


def test_read_values_nulls_and_units(tmp_path):
    frame, units = read_gdf2(_write(tmp_path), columns=COLUMNS)
    assert len(frame) == 3  # the COMM record is skipped
    assert list(frame["source_row"]) == [2, 3, 4]
    np.testing.assert_allclose(frame["longitude"], [138.5, 138.500123, 138.500246])
    assert np.isnan(frame["height"].iloc[1]) and np.isnan(frame["total_field"].iloc[1])  # NULL -> NaN
    assert frame["total_field"].iloc[0] == 56000.125
    assert list(frame["raw_CODE"]) == ["OK", "BAD", "OK"]
    assert frame["raw_GRAD_2"].iloc[0] == "-3.4000E-03"
    assert list(frame["date"]) == ["20240501"] * 3 and frame["time"].iloc[1] == "36000.10"
    # unit names of the .des mapped to potfield's table: 'ft' and 'nanotesla' -> nT
    assert units == {"height": "ft", "total_field": "nT"}
    # an [input.units] entry wins over the .des
    _, units = read_gdf2(tmp_path / "survey.dat", columns=COLUMNS, units={"height": "m"})
    assert "height" not in units


def test_unknown_field_and_missing_descriptor(tmp_path):
    dat = _write(tmp_path)
    with pytest.raises(InputDataError, match="field 'MAGNETIC' .* its fields are: FID, LINE"):
        read_gdf2(dat, columns={"total_field": "MAGNETIC"})
    (tmp_path / "survey.des").unlink()
    with pytest.raises(InputDataError, match="without its descriptor .* survey.des"):
        read_gdf2(dat, columns={"total_field": "MAG"})


def test_unknown_unit_and_misaligned_record(tmp_path):
    dat = _write(tmp_path, des=DES.replace("UNITS=ft", "UNITS=cubits"))
    with pytest.raises(InputDataError, match="units 'cubits'.*input.units"):
        read_gdf2(dat, columns={"height": "ALT"})
    dat = _write(tmp_path)
    text = dat.read_text().splitlines()
    text[2] = "x" + text[2]  # shifts every field of line 3 by one character
    dat.write_text("\n".join(text) + "\n")
    with pytest.raises(InputDataError, match="line 3"):
        read_gdf2(dat, columns={"total_field": "MAG", "longitude": "LON"})


def test_typed_data_records(tmp_path):
    # ASEG-GDF2 also allows data records with a record type (RT=DATA): each line starts with it
    des = (
        "DEFN   ST=RECD,RT=COMM;RT:A4;COMMENTS:A76\n"
        "DEFN 1 ST=RECD,RT=DATA;RT:A4\n"
        "DEFN 2 ST=RECD,RT=DATA;X:F10.1:UNITS=m\n"
        "DEFN 3 ST=RECD,RT=DATA;MAG:F10.2:UNITS=nT,NULL=-99999.99\n"
        "DEFN 4 ST=RECD,RT=DATA;END DEFN\n"
    )
    (tmp_path / "typed.des").write_text(des)
    lines = [
        "COMM invented",
        "DATA%10.1f%10.2f" % (500000.0, 56000.5),  # noqa: UP031
        "HEAD something else",  # noqa: UP031
        "DATA%10.1f%10.2f" % (500010.0, -99999.99),  # noqa: UP031
    ]  # noqa: UP031
    (tmp_path / "typed.dat").write_text("\n".join(lines) + "\n")
    frame, units = read_gdf2(tmp_path / "typed.dat", columns={"easting": "X", "total_field": "MAG"})
    assert list(frame["source_row"]) == [2, 4]
    assert frame["easting"].tolist() == [500000.0, 500010.0]
    assert frame["total_field"].iloc[0] == 56000.5 and np.isnan(frame["total_field"].iloc[1])
    assert units == {"easting": "m", "total_field": "nT"}
