"""Time layouts as recorded (potfield.io.timefmt), on invented values.

The expected instants come from Python's standard library (datetime.strptime, zoneinfo with
the IANA time-zone database), an implementation independent of the pandas code under test.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from potfield.config import TimeSection
from potfield.errors import ConfigError, InputDataError, PotfieldError
from potfield.io.timefmt import parse_times

PATH = Path("invented.csv")


def _frame(**columns) -> pd.DataFrame:
    frame = pd.DataFrame({k: pd.Series(v, dtype="string") for k, v in columns.items()})
    frame["source_row"] = np.arange(len(frame)) + 2
    return frame


def _utc(dt: datetime) -> np.datetime64:
    """A stdlib datetime (aware, or naive = UTC) as datetime64[ns] UTC."""
    if dt.tzinfo is not None:
        dt = dt.astimezone(UTC).replace(tzinfo=None)
    return np.datetime64(dt, "ns")


def test_strftime_pattern_with_date_and_fractional_seconds():
    texts = ["2024/05/01 10:00:01", "2024/05/01 10:00:02.25", "2024/12/31 23:59:59.5"]
    got = parse_times(_frame(time=texts), TimeSection(format="%Y/%m/%d %H:%M:%S"), PATH)
    # reference: datetime.strptime (stdlib); fractions through %f
    want = [
        _utc(datetime.strptime(t, "%Y/%m/%d %H:%M:%S.%f" if "." in t else "%Y/%m/%d %H:%M:%S")) for t in texts
    ]
    assert list(got) == want


def test_separate_date_and_hhmmss_columns_with_lost_leading_zero():
    frame = _frame(date=["01/05/2024", "01/05/2024", "02/05/2024"], time=["93015", "093016.5", "000001"])
    spec = TimeSection(format="%H%M%S", date_format="%d/%m/%Y")
    got = parse_times(frame, spec, PATH)
    want = [
        _utc(datetime(2024, 5, 1, 9, 30, 15)),
        _utc(datetime(2024, 5, 1, 9, 30, 16, 500000)),
        _utc(datetime(2024, 5, 2, 0, 0, 1)),
    ]  # stdlib datetime
    assert list(got) == want


def test_iso_time_of_day_with_a_date_column():
    frame = _frame(date=["20240501", "2024-05-01", "2024/05/02"], time=["23:59:59.9", "12:00:00", "00:00:00"])
    got = parse_times(frame, TimeSection(), PATH)
    assert list(got) == [
        _utc(datetime(2024, 5, 1, 23, 59, 59, 900000)),
        _utc(datetime(2024, 5, 1, 12)),
        _utc(datetime(2024, 5, 2)),
    ]


def test_date_only_station_list():
    got = parse_times(_frame(date=["03/05/2024", "04/05/2024"]), TimeSection(date_format="%d/%m/%Y"), PATH)
    assert list(got) == [_utc(datetime(2024, 5, 3)), _utc(datetime(2024, 5, 4))]
    # a date-only pattern on the time column gives the same
    got = parse_times(_frame(time=["03/05/2024"]), TimeSection(format="%d/%m/%Y"), PATH)
    assert got[0] == _utc(datetime(2024, 5, 3))


def test_utc_offset_and_clock_offset():
    # logger on UTC+9.5, clock 2.5 s ahead of GNSS time
    spec = TimeSection(format="%Y-%m-%d %H:%M:%S", utc_offset_h=9.5, clock_offset_s=2.5)
    got = parse_times(_frame(time=["2024-05-01 09:30:02", "2024-05-01 00:10:00"]), spec, PATH)
    zone = timezone(timedelta(hours=9, minutes=30))  # stdlib fixed offset
    want = [
        _utc(datetime(2024, 5, 1, 9, 30, 2, tzinfo=zone) - timedelta(seconds=2.5)),
        _utc(datetime(2024, 5, 1, 0, 10, tzinfo=zone) - timedelta(seconds=2.5)),
    ]
    assert list(got) == want
    assert str(got[1]).startswith("2024-04-30T14:39:57.5")  # crosses back over midnight UTC


def test_iso_text_with_its_own_zone_is_not_shifted_again():
    spec = TimeSection(utc_offset_h=10)
    got = parse_times(
        _frame(time=["2024-05-01T10:00:00+02:00", "2024-05-01T10:00:00Z", "2024-05-01T10:00:00"]), spec, PATH
    )
    assert list(got) == [
        _utc(datetime(2024, 5, 1, 8)),
        _utc(datetime(2024, 5, 1, 10)),
        _utc(datetime(2024, 5, 1, 0)),
    ]


def test_time_zone_follows_daylight_saving():
    texts = ["2024-01-15 12:00:00", "2024-07-15 12:00:00"]
    got = parse_times(
        _frame(time=texts), TimeSection(format="%Y-%m-%d %H:%M:%S", timezone="Australia/Adelaide"), PATH
    )
    zone = ZoneInfo("Australia/Adelaide")  # IANA database through the stdlib
    want = [_utc(datetime.strptime(t, "%Y-%m-%d %H:%M:%S").replace(tzinfo=zone)) for t in texts]
    assert list(got) == want
    assert got[1] - got[0] != np.timedelta64(182, "D")  # summer +10:30, winter +9:30


def test_nonexistent_local_time_is_refused():
    spec = TimeSection(format="%Y-%m-%d %H:%M:%S", timezone="Europe/Berlin")
    # 2024-03-31 02:30 does not exist in Central Europe (clocks jump 02:00 -> 03:00; IANA tzdb)
    with pytest.raises(InputDataError, match="daylight-saving change in Europe/Berlin at line 3"):
        parse_times(_frame(time=["2024-03-31 01:30:00", "2024-03-31 02:30:00"]), spec, PATH)


def test_time_of_day_without_date_column_rolls_over_midnight():
    spec = TimeSection(format="%H:%M:%S", date="2024-05-01")
    got = parse_times(_frame(time=["23:59:58", "23:59:59", "00:00:00", "00:00:01"]), spec, PATH)
    assert got[2] == _utc(datetime(2024, 5, 2))  # the day after, not 24 h back
    assert np.all(np.diff(got) == np.timedelta64(1, "s"))


def test_seconds_of_day_above_86400_refused():
    frame = _frame(date=["2024-05-01", "2024-05-01"], time=["43200", "120204"])
    with pytest.raises(InputDataError, match=r"time 120204 in column time is not seconds of day .* line 3"):
        parse_times(frame, TimeSection(format="date_seconds"), PATH)
    # 43200 s of day is 12:00:00 (86,400 s per day: common practice)
    ok = parse_times(frame.iloc[:1], TimeSection(format="date_seconds"), PATH)
    assert ok[0] == _utc(datetime(2024, 5, 1, 12))


def test_seconds_of_day_from_a_column_named_like_hhmmss_refused():
    frame = _frame(date=["2024-05-01"], time=["1204"])
    with pytest.raises(ConfigError, match="reads like an hhmmss time"):
        parse_times(frame, TimeSection(format="date_seconds"), PATH, names={"time": "HHMMSS", "date": "DATE"})


def test_errors_name_the_column_that_failed():
    names = {"date": "DAY", "time": "CLOCK"}
    bad_date = _frame(date=["2024-05-01", "2024-02-30"], time=["10:00:00", "10:00:01"])
    with pytest.raises(InputDataError) as err:
        parse_times(bad_date, TimeSection(), PATH, names=names)
    assert "date '2024-02-30' in column 'DAY' (date)" in str(err.value) and "line 3" in str(err.value)
    assert "CLOCK" not in str(err.value)
    bad_time = _frame(date=["2024-05-01", "2024-05-01"], time=["10:00:00", "10:61:00"])
    with pytest.raises(InputDataError) as err:
        parse_times(bad_time, TimeSection(format="%H:%M:%S"), PATH, names=names)
    assert "time '10:61:00' in column 'CLOCK' (time)" in str(err.value) and "DAY" not in str(err.value)


def test_bad_settings_are_config_errors():
    with pytest.raises(ValueError, match="strftime pattern"):
        TimeSection(format="hhmmss")
    with pytest.raises(ConfigError, match="holds a date but a date column is mapped"):
        parse_times(
            _frame(date=["2024-05-01"], time=["2024-05-01 10:00"]), TimeSection(format="%Y-%m-%d %H:%M"), PATH
        )
    with pytest.raises(ConfigError, match="unknown time zone"):
        parse_times(_frame(time=["2024-05-01T10:00:00"]), TimeSection(timezone="Nowhere/Atlantis"), PATH)
    with pytest.raises(PotfieldError, match="no date"):
        parse_times(_frame(time=["10:00:00"]), TimeSection(format="%H:%M:%S"), PATH)


def test_iso_timestamps_win_over_a_mapped_date_column():
    # files that map a date column beside full ISO timestamps keep reading as before
    frame = _frame(date=["2024-05-01"], time=["2024-05-01T10:00:00Z"])
    assert parse_times(frame, TimeSection(), PATH)[0] == _utc(datetime(2024, 5, 1, 10))


def test_iso_time_of_day_with_the_date_in_the_config():
    frame = _frame(time=["23:59:59", "00:00:01"])
    got = parse_times(frame, TimeSection(date="2024-05-01"), PATH)
    assert list(got) == [_utc(datetime(2024, 5, 1, 23, 59, 59)), _utc(datetime(2024, 5, 2, 0, 0, 1))]


def test_iso_fast_path_agrees_with_pandas_and_defers_what_it_cannot_read():
    """Arrow's ISO 8601 parser (fast path of the iso layout) against pandas.to_datetime
    (format="ISO8601", utc=True) as the reference; mixed, missing and out-of-range values go
    to the general path (None), which names the rows it cannot read (ISO 8601-1:2019)."""
    import pandas as pd

    from potfield.io.delimited import _iso_times_fast

    for values in (
        ["2024-11-18T22:30:00.100Z", "2024-11-18T22:30:01Z", "2024-11-18T22:30:00+10:00"],
        ["2024-11-18 22:30:00.125", "2024-11-18"],
    ):
        raw = pd.Series(values, dtype=object)
        reference = pd.to_datetime(raw, utc=True, format="ISO8601").dt.tz_convert(None)
        fast = _iso_times_fast(raw)
        assert fast is not None
        assert (fast == reference.astype("datetime64[ns]").to_numpy()).all()
    for values in (
        ["2024-11-18T22:30:00Z", "2024-11-18 22:30:00"],  # with and without a zone
        ["2024-11-18T22:30:00Z", None],
        ["2300-01-01T00:00:00Z"],  # beyond datetime64[ns]
        [" 2024-11-18T22:30:00Z"],
    ):
        assert _iso_times_fast(pd.Series(values, dtype=object)) is None
