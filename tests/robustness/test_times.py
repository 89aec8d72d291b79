"""Times pandas cannot hold are unreadable times at their lines, never wrapped or garbled.

datetime64[ns] spans 1677-09-21 00:12:43 .. 2262-04-11 23:47:16 (numpy datetime64 documentation,
"Datetime Units": +-2.9e2 years around 1970 for ns); values outside it must be reported.
"""

from __future__ import annotations

import numpy as np
import pytest

from potfield.config import TimeSection
from potfield.errors import InputDataError
from potfield.io.delimited import parse_time, read_delimited

DATE_SECONDS = {"date": "DATE", "time": "SOD", "total_field": "F"}
ISO = {"time": "T", "total_field": "F"}


@pytest.mark.parametrize(
    "text, columns, fmt, expected",
    [
        (
            "DATE,SOD,F\n2024-01-01,10,1\n1500-01-01,10,1\n",
            DATE_SECONDS,
            "date_seconds",
            ["'1500-01-01 10'", "line 3"],
        ),
        ("DATE,SOD,F\n2262-04-11,86000,2\n", DATE_SECONDS, "date_seconds", ["line 2"]),
        ("DATE,SOD,F\n2024-01-01,1e30,2\n", DATE_SECONDS, "date_seconds", ["line 2"]),
        ("DATE,SOD,F\n2024-01-01,1e6,2\n", DATE_SECONDS, "decimal_hours", ["line 2"]),
        ("T,F\n2024-01-01T00:00:00,1\n+10000-01-01T00:00:00,1\n", ISO, "iso", ["line 3"]),
        ("T,F\n2262-04-11T23:59:59,2\n", ISO, "iso", ["line 2"]),
        ("T,F\n1600-01-01T00:00:00Z,2\n", ISO, "iso", ["line 2"]),
    ],
)
def test_out_of_range_times_name_the_line(tmp_path, text, columns, fmt, expected):
    path = tmp_path / "t.csv"
    path.write_text(text)
    frame = read_delimited(path, columns=columns)
    with pytest.raises(InputDataError) as err:
        parse_time(frame, TimeSection(format=fmt), path)
    for part in expected:
        assert part in str(err.value)


def test_iso_basic_format_still_reads(tmp_path):
    # ISO 8601 basic format (no separators) is valid ISO 8601 (ISO 8601-1:2019, 5.2.2)
    path = tmp_path / "t.csv"
    path.write_text("T,F\n20240101T000000Z,1\n2024-01-01T00:00:01Z,2\n")
    frame = read_delimited(path, columns=ISO)
    times = parse_time(frame, TimeSection(format="iso"), path)
    assert times[0] == np.datetime64("2024-01-01T00:00:00", "ns")
    assert times[1] - times[0] == np.timedelta64(1, "s")
