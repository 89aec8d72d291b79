"""Times of readings and base records as recorded: layouts, patterns, zones and clock offsets.

One parser for the survey readings and the base-station records (``[input.time]`` and
``[diurnal.bases.time]`` are the same :class:`~potfield.config.TimeSection`). Everything is
vectorised (``pandas.to_datetime`` with an explicit ``format=``, ``pandas.to_timedelta``); no
Python loop over readings.

Layouts
-------
* ``format = "iso"``: ISO 8601 in the ``time`` column. When it holds times of day only
  (``hh:mm:ss[.fff]``), the day comes from the ``date`` column or ``[input.time] date``; full
  ISO timestamps keep their own day (a mapped date column is then not used).
* ``format = "date_seconds"``: seconds of day (0..86,400) in ``time``; the day from the ``date``
  column or ``[input.time] date``. A value above 86,400, or a time column whose name reads like
  an hhmmss pattern (``HHMMSS``, ``hh:mm:ss``), is refused: ``120204`` is 12:02:04, not
  120,204 s.
* ``format = "decimal_hours"``: hours of day in ``time``.
* ``format`` = any ``strftime`` pattern (contains ``%``), e.g. ``"%Y/%m/%d %H:%M:%S"`` (date and
  time in one column), ``"%H%M%S"`` or ``"%H:%M:%S.%f"`` (time of day; the day from the date
  column or ``date``) or ``"%d/%m/%Y"`` (a date only: station lists). A pattern ending in ``%S``
  also reads fractional seconds; ``%H%M%S`` values that lost their leading zero (``90204``) are
  zero-padded.
* only a ``date`` column mapped (no ``time``): the readings carry dates only; the time is
  midnight of that day (local, then shifted to UTC by the zone below).

The ``date`` column is read with ``date_format`` (a ``strftime`` pattern) or, unset, as
``YYYY-MM-DD``, ``YYYY/MM/DD`` or ``YYYYMMDD``.

Zones and clocks
----------------
Times without their own zone are local times ``utc_offset_h`` hours ahead of UTC (or in the
IANA ``timezone``, following daylight saving); ISO times that carry ``Z`` or ``+hh:mm`` keep
their own zone. Then ``clock_offset_s`` (the instrument clock minus the reference clock, GNSS or
base; the sign of the diurnal stage's time-offset estimate) is subtracted.

Times of day without a date column roll over to the next day when they drop by more than 12 h
between consecutive rows (a record across midnight).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import ConfigError, InputDataError, format_rows

#: Named layouts of ``format`` (besides strftime patterns).
NAMED_FORMATS = ("iso", "date_seconds", "decimal_hours")
#: strftime directives that fix the day; those that fix the time of day.
DATE_DIRECTIVES = set("YymdjbBaAUWGVuweh")
TIME_DIRECTIVES = set("HIMSfpzZ")
SECONDS_PER_DAY = 86_400.0
_NS_PER_S = 1_000_000_000
#: A column name that reads like an hhmmss pattern.
_HHMMSS_NAME = re.compile(r"^\s*h{1,2}[:_\-]?m{1,2}[:_\-]?s{1,2}(\.s+)?\s*$", re.IGNORECASE)
#: ISO text that carries its own zone (Z, UTC, +hh, +hhmm, +hh:mm after a time).
_ZONE_SUFFIX = r"(?i)[T\s]\d{1,2}(?::?\d{2}){0,2}(?:[.,]\d+)?\s*(?:Z|UTC|GMT|[+-]\d{2}(?::?\d{2})?)$"


def directives(pattern: str) -> set[str]:
    """The directive letters of a ``strftime`` pattern (``"%d/%m/%Y"`` -> ``{"d", "m", "Y"}``)."""
    return set(re.findall(r"%-?([A-Za-z])", pattern))


def check_format(value: str) -> str:
    """``value`` if it is a named layout or a ``strftime`` pattern, else ``ValueError``."""
    if value in NAMED_FORMATS or "%" in value:
        return value
    raise ValueError(
        f"time format '{value}' is neither {', '.join(NAMED_FORMATS)} nor a strftime "
        "pattern such as '%Y/%m/%d %H:%M:%S' or '%H%M%S'"
    )


def _column(names: dict | None, canon: str) -> str:
    """``column 'DATE' (date)`` for messages."""
    name = (names or {}).get(canon)
    return f"column '{name}' ({canon})" if name and name != canon else f"column {canon}"


def _fail(path, frame, bad, text: pd.Series, what: str, fix: str) -> None:
    """``what`` is "NOUN in COLUMN ..." -> "cannot read the NOUN 'VALUE' in COLUMN ... at line N"."""
    rows = frame["source_row"].to_numpy()[bad] if "source_row" in frame else np.flatnonzero(bad) + 1
    example = text[bad].iloc[0] if bad.any() else ""
    noun, _, rest = what.partition(" in ")
    raise InputDataError(
        f"cannot read the {noun} '{example}' in {rest} at line {format_rows(rows)}", file=path, fix=fix
    )


def _text(series: pd.Series) -> pd.Series:
    return series.astype("string").str.strip()


def _with_fractions(text: pd.Series, pattern: str, utc: bool) -> pd.Series:
    """``to_datetime(format=pattern)``; rows failing a pattern ending in ``%S`` are retried with
    fractional seconds (``%S.%f``)."""
    parsed = pd.to_datetime(text, format=pattern, errors="coerce", utc=utc)
    if "%S" in pattern and "%f" not in pattern:
        retry = parsed.isna() & text.notna()
        if retry.any():
            again = pd.to_datetime(
                text[retry].str.replace(",", ".", regex=False),
                format=pattern.replace("%S", "%S.%f"),
                errors="coerce",
                utc=utc,
            )
            parsed = parsed.copy()
            parsed[retry] = again
    return parsed


def _naive_ns(parsed: pd.Series) -> np.ndarray:
    if isinstance(parsed.dtype, pd.DatetimeTZDtype):
        parsed = parsed.dt.tz_convert("UTC").dt.tz_localize(None)
    return parsed.to_numpy(dtype="datetime64[ns]")


def _pad_compact(text: pd.Series, pattern: str) -> pd.Series:
    """Zero-pad ``%H%M%S`` / ``%H%M`` times that lost their leading zero (``90204`` -> ``090204``)."""
    for head, width in (("%H%M%S", 6), ("%H%M", 4)):
        if pattern.startswith(head):
            parts = text.str.extract(r"^(\d+)(.*)$")
            short = parts[0].str.len() < width
            padded = parts[0].str.zfill(width) + parts[1].fillna("")
            return text.where(~short.fillna(False).astype(bool), padded)
    return text


def parse_date(series: pd.Series, date_format: str | None) -> np.ndarray:
    """Dates as datetime64[ns] at midnight; NaT where unreadable.

    ``date_format`` is a ``strftime`` pattern; ``None`` accepts ``YYYY-MM-DD``, ``YYYY/MM/DD``
    and ``YYYYMMDD`` (also from a numeric column: ``20240501.0``).
    """
    text = _text(series)
    if date_format:
        return _naive_ns(_with_fractions(text, date_format, "%z" in date_format))
    text = text.str.replace(r"^(\d{8})\.0*$", r"\1", regex=True)
    compact = text.str.fullmatch(r"\d{8}").fillna(False).astype(bool)
    text = text.where(
        ~compact, text.str.slice(0, 4) + "-" + text.str.slice(4, 6) + "-" + text.str.slice(6, 8)
    )
    text = text.str.replace("/", "-", regex=False)
    return pd.to_datetime(text, format="%Y-%m-%d", errors="coerce").to_numpy(dtype="datetime64[ns]")


def _rollover(tod_ns: np.ndarray) -> np.ndarray:
    """Add a day at every drop of more than 12 h between consecutive times of day."""
    out = tod_ns.astype(np.int64, copy=True)
    if out.size > 1:
        finite = out != np.iinfo(np.int64).min
        drop = np.zeros(out.size, dtype=bool)
        valid = np.flatnonzero(finite)
        if valid.size > 1:
            steps = np.diff(out[valid])
            drop[valid[1:]] = steps < -12 * 3600 * _NS_PER_S
        days = np.cumsum(drop)
        out = np.where(finite, out + days * 86_400 * _NS_PER_S, out)
    return out


def parse_times(
    frame: pd.DataFrame, spec, path: Path, *, names: dict | None = None, key: str = "input.time"
) -> np.ndarray:
    """Times of the rows of ``frame`` as datetime64[ns] (UTC, timezone-naive).

    Parameters
    ----------
    frame : pandas.DataFrame
        Canonical ``time`` and/or ``date`` columns (text or numbers) and ``source_row``.
    spec : potfield.config.TimeSection
        ``format``, ``date``, ``date_format``, ``utc_offset_h``, ``timezone``, ``clock_offset_s``.
    path : Path
        The file, for messages.
    names : dict, optional
        Canonical name -> the file's column name, so messages name the column that failed.
    key : str
        The config table of ``spec`` (``input.time`` or ``diurnal.bases[0].time``), for messages.

    Returns
    -------
    numpy.ndarray
        datetime64[ns]; every row readable (else :class:`InputDataError` naming the column,
        the line numbers and the fix).
    """
    fmt = spec.format
    has_time, has_date = "time" in frame, "date" in frame
    if not has_time and not has_date:
        raise InputDataError(
            "no input column is mapped to 'time'",
            file=path,
            key=key.replace(".time", ".columns.time"),
            fix='map time = "<your time column>" (or a date column for station lists)',
        )
    time_col, date_col = _column(names, "time"), _column(names, "date")
    pattern = fmt if "%" in fmt else None
    marks = directives(pattern) if pattern else set()
    if pattern and marks & DATE_DIRECTIVES and has_time and has_date:
        raise ConfigError(
            f"time format '{fmt}' holds a date but a date column is mapped too",
            key=f"{key}.format",
            fix="use a time-of-day pattern such as '%H:%M:%S' (the date from the date "
            "column, read with date_format) or unmap the date column",
        )
    full = None  # datetime64[ns]: the time column carries the day
    tod = None  # int64 ns since midnight: the time column carries the time of day
    naive = None  # rows whose text had no zone of its own (None = all)
    if has_time:
        raw = frame["time"]
        text = _text(raw)
        if fmt == "iso":
            # a time column that carries its own day (ISO date) wins over a mapped date column;
            # without one, it holds the time of day when the day comes from elsewhere
            head = text.head(50).dropna()
            own_day = (
                bool(
                    head.str.contains(r"\d{4}-?\d{2}-?\d{2}[T\s]|^\d{4}-\d{2}-\d{2}$", regex=True).mean()
                    > 0.5
                )
                if len(head)
                else True
            )
            if own_day:
                has_date = False
            if not own_day and (has_date or spec.date):
                tod_td = pd.to_timedelta(text.str.replace(",", ".", regex=False), errors="coerce")
                tod = tod_td.to_numpy(dtype="timedelta64[ns]").astype(np.int64)
                bad = (
                    np.isnat(tod_td.to_numpy(dtype="timedelta64[ns]"))
                    | (tod < 0)
                    | (tod > SECONDS_PER_DAY * _NS_PER_S)
                )
                if bad.any():
                    _fail(
                        path,
                        frame,
                        bad,
                        text,
                        f"time of day in {time_col}",
                        f"write hh:mm:ss[.fff] there, or set [{key}] format to the pattern it uses "
                        "(e.g. '%H%M%S'); with a date column the time column holds the time of day",
                    )
            else:
                parsed = pd.to_datetime(text, utc=True, errors="coerce", format="ISO8601")
                full = _naive_ns(parsed)
                if spec.utc_offset_h or spec.timezone:  # only then do zone-less rows matter
                    naive = ~text.str.contains(_ZONE_SUFFIX, regex=True).fillna(False).to_numpy(bool)
                bad = np.isnat(full)
                if bad.any():
                    _fail(
                        path,
                        frame,
                        bad,
                        text,
                        f"time in {time_col} as iso",
                        f"use ISO 8601 (2024-05-01T10:00:00Z) or set [{key}] format to the one "
                        "the file uses (a strftime pattern such as '%d/%m/%Y %H:%M:%S')",
                    )
        elif fmt in ("date_seconds", "decimal_hours"):
            name = (names or {}).get("time", "")
            if fmt == "date_seconds" and _HHMMSS_NAME.match(str(name)):
                raise ConfigError(
                    f"time column '{name}' reads like an hhmmss time, not seconds of day",
                    file=path,
                    key=f"{key}.format",
                    fix="set format = '%H%M%S' (or '%H:%M:%S') for that column",
                )
            value = pd.to_numeric(text.str.replace(",", ".", regex=False), errors="coerce").to_numpy(float)
            bad = ~np.isfinite(value)
            if bad.any():
                _fail(
                    path,
                    frame,
                    bad,
                    text,
                    f"time in {time_col} as {fmt}",
                    f"write a number there, or set [{key}] format to the pattern the file uses "
                    "(e.g. '%H:%M:%S')",
                )
            seconds = value if fmt == "date_seconds" else value * 3600.0
            if fmt == "date_seconds":
                over = (seconds > SECONDS_PER_DAY) | (seconds < 0)
                if over.any():
                    rows = frame["source_row"].to_numpy()[over]
                    raise InputDataError(
                        f"time {text[over].iloc[0]} in {time_col} is not seconds of day (0..86,400) "
                        f"at line {format_rows(rows)}",
                        file=path,
                        fix=f"if it is hhmmss (120204 = 12:02:04) set [{key}] format = '%H%M%S'",
                    )
                tod = np.round(seconds * _NS_PER_S).astype(np.int64)
            else:
                # decimal hours: hours of day; a drop of more than 12 h is the next day
                tod = np.round(seconds * _NS_PER_S).astype(np.int64)
        else:
            if not marks & TIME_DIRECTIVES and has_date:
                raise ConfigError(
                    f"time format '{fmt}' has no time-of-day directive (%H, %M, %S)",
                    key=f"{key}.format",
                    fix="give the pattern of the time column",
                )
            text = _pad_compact(text, pattern)
            parsed = _with_fractions(text, pattern, bool({"z", "Z"} & marks))
            values = _naive_ns(parsed)
            bad = np.isnat(values)
            if bad.any():
                _fail(
                    path,
                    frame,
                    bad,
                    text,
                    f"time in {time_col} with pattern '{fmt}'",
                    f"correct those values or set [{key}] format to the pattern the file uses",
                )
            if marks & DATE_DIRECTIVES:
                full = values
                if {"z", "Z"} & marks:
                    naive = np.zeros(len(frame), dtype=bool)
            else:
                tod = (values - np.datetime64("1900-01-01", "ns")).astype(np.int64)
    if full is None:
        if has_date:
            day = parse_date(frame["date"], spec.date_format)
            bad = np.isnat(day)
            if bad.any():
                shown = f"date_format '{spec.date_format}'" if spec.date_format else "YYYY-MM-DD"
                _fail(
                    path,
                    frame,
                    bad,
                    _text(frame["date"]),
                    f"date in {date_col} as {shown}",
                    f"correct those dates or set [{key}] date_format (e.g. '%d/%m/%Y')",
                )
        elif spec.date:
            try:
                stamp = pd.Timestamp(spec.date)
            except (ValueError, TypeError):
                raise ConfigError(
                    f"cannot read date '{spec.date}'", key=f"{key}.date", fix='write it as "YYYY-MM-DD"'
                ) from None
            day = np.full(len(frame), np.datetime64(stamp.to_datetime64(), "ns"))
            tod = _rollover(tod)
        else:
            raise InputDataError(
                f"time format '{fmt}' gives the time of day only and there is no date",
                file=path,
                key=f"{key}.date",
                fix=f'map a date column (input.columns.date) or set date = "YYYY-MM-DD" under [{key}]',
            )
        full = day if tod is None else day + tod.astype("timedelta64[ns]")
    return _to_utc(full, naive, spec, frame, path, key)


def _to_utc(values: np.ndarray, naive, spec, frame, path, key) -> np.ndarray:
    """Local (zone-less) times to UTC by ``timezone`` or ``utc_offset_h``; minus the clock offset."""
    values = values.astype("datetime64[ns]")
    mask = np.ones(values.size, dtype=bool) if naive is None else np.asarray(naive, dtype=bool)
    tz = getattr(spec, "timezone", None)
    offset_h = float(getattr(spec, "utc_offset_h", 0.0) or 0.0)
    if tz and offset_h:
        raise ConfigError(
            "both timezone and utc_offset_h are set", key=f"{key}.timezone", fix="keep one of them"
        )
    if tz and mask.any():
        try:
            local = pd.DatetimeIndex(values[mask]).tz_localize(tz, ambiguous="NaT", nonexistent="NaT")
        except Exception as err:  # unknown zone names raise several types (pytz, zoneinfo)
            if isinstance(err, (InputDataError, ConfigError)):
                raise
            raise ConfigError(
                f"unknown time zone '{tz}'",
                key=f"{key}.timezone",
                fix="use an IANA name such as 'Australia/Perth' or set utc_offset_h",
            ) from None
        converted = local.tz_convert("UTC").tz_localize(None).to_numpy(dtype="datetime64[ns]")
        lost = np.isnat(converted)
        if lost.any():
            rows = frame["source_row"].to_numpy()[mask][lost]
            raise InputDataError(
                f"local time {pd.Timestamp(values[mask][lost][0])} is skipped or repeated by a "
                f"daylight-saving change in {tz} at line {format_rows(rows)}",
                file=path,
                fix="set utc_offset_h to the offset the logger kept instead of timezone",
            )
        values = values.copy()
        values[mask] = converted
    elif offset_h:
        shift = np.int64(round(offset_h * 3600 * _NS_PER_S))
        values = np.where(mask, values - shift.astype("timedelta64[ns]"), values)
    clock = float(getattr(spec, "clock_offset_s", 0.0) or 0.0)
    if clock:
        values = values - np.timedelta64(round(clock * _NS_PER_S), "ns")
    return values.astype("datetime64[ns]")
