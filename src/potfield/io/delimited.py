"""Delimited-text readers (comma, semicolon, tab, whitespace; optionally gzip-compressed).

The reader maps the user's column names to canonical names, parses times, converts units and
reports every problem as one line naming the file, the line number and the fix. Line numbers
count from 1 at the top of the file (the header line included), as a text editor shows them.
"""

from __future__ import annotations

import gzip
from pathlib import Path
from typing import Protocol

import numpy as np
import pandas as pd

from ..errors import InputDataError, format_rows

#: Columns that stay text.
TEXT_COLUMNS = {"line", "line_type", "station", "loop", "date", "time"}


def _open_text(path: Path):
    if path.suffix == ".gz":
        return gzip.open(path, "rt", encoding="utf-8", errors="replace")
    return open(path, encoding="utf-8", errors="replace")


def sniff_delimiter(path: Path, skip_rows: int = 0) -> str:
    """Guess the delimiter from the header line: ``,`` ``;`` tab or whitespace."""
    with _open_text(path) as handle:
        for _ in range(skip_rows):
            handle.readline()
        header = handle.readline()
    if not header.strip():
        raise InputDataError("file is empty", file=path, fix="check that the right file is named")
    for candidate in (",", ";", "\t"):
        if candidate in header:
            return candidate
    return "whitespace"


def read_delimited(path: Path, *, columns: dict[str, str], delimiter: str = "auto",
                   skip_rows: int = 0, missing_values=(), required=()) -> pd.DataFrame:
    """Read the mapped columns of one delimited file, renamed to canonical names.

    Parameters
    ----------
    path : Path
    columns : dict
        Canonical name -> the file's column name.
    delimiter : str
        ``"auto"``, ``","``, ``";"``, ``"\\t"`` or ``"whitespace"``.
    required : iterable of str
        Canonical names that must be mapped and present.

    Returns
    -------
    pandas.DataFrame
        Canonical columns plus ``source_row`` (line number in the file, 1-based).
    """
    path = Path(path)
    if not path.is_file():
        raise InputDataError("file not found", file=path, fix="check the file name in survey.toml")
    if path.stat().st_size == 0:
        raise InputDataError("file is empty", file=path, fix="check that the right file is named")
    for name in required:
        if name not in columns:
            raise InputDataError(
                f"no input column is mapped to '{name}'", file=path, key=f"input.columns.{name}",
                fix=f"add {name} = \"<your column>\" under [input.columns]",
            )
    sep = sniff_delimiter(path, skip_rows) if delimiter == "auto" else delimiter
    wanted = list(dict.fromkeys(columns.values()))
    kwargs = dict(skiprows=skip_rows, na_values=list(missing_values), keep_default_na=True,
                  dtype={c: str for c, canon in ((v, k) for k, v in columns.items())
                         if canon in TEXT_COLUMNS})
    try:
        if sep == "whitespace":
            header = pd.read_csv(path, sep=r"\s+", nrows=0, skiprows=skip_rows).columns
        else:
            header = pd.read_csv(path, sep=sep, nrows=0, skiprows=skip_rows).columns
    except pd.errors.EmptyDataError:
        raise InputDataError("file is empty", file=path, fix="check that the right file is named") from None
    header = [str(h).strip() for h in header]
    missing = [c for c in wanted if c not in header]
    if missing:
        canon = [k for k, v in columns.items() if v == missing[0]][0]
        raise InputDataError(
            f"column '{missing[0]}' (mapped to {canon}) is not in the file; its columns are: "
            f"{', '.join(header[:20])}", file=path, key=f"input.columns.{canon}",
            fix="correct the column name under [input.columns]",
        )
    try:
        if sep == "whitespace":
            frame = pd.read_csv(path, sep=r"\s+", usecols=lambda c: str(c).strip() in wanted, **kwargs)
        elif len(sep) == 1 and not skip_rows and path.suffix != ".gz":
            try:  # pyarrow's reader is several times faster on large files
                frame = pd.read_csv(path, sep=sep, usecols=wanted, engine="pyarrow", **kwargs)
            except (ValueError, TypeError, KeyError):
                frame = pd.read_csv(path, sep=sep, usecols=lambda c: str(c).strip() in wanted, **kwargs)
        else:
            frame = pd.read_csv(path, sep=sep, usecols=lambda c: str(c).strip() in wanted, **kwargs)
    except pd.errors.ParserError as err:
        raise InputDataError(f"cannot parse the file ({str(err).splitlines()[0]})", file=path,
                             fix="check the delimiter and that every line has the same fields") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    if frame.empty:
        raise InputDataError("file has a header but no data rows", file=path,
                             fix="check that the right file is named")
    out = pd.DataFrame(index=pd.RangeIndex(len(frame)))
    for canon, col in columns.items():
        out[canon] = frame[col].to_numpy()
    out["source_file"] = path.name
    out["source_row"] = np.arange(len(frame), dtype=np.int64) + skip_rows + 2
    return out


def to_numeric(frame: pd.DataFrame, name: str, path: Path) -> np.ndarray:
    """Column ``name`` as float; non-numeric entries are an error naming their line numbers."""
    col = frame[name]
    if pd.api.types.is_numeric_dtype(col.dtype):
        return col.to_numpy(dtype=float)
    values = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float)
    text = col.astype("string")
    bad = np.isnan(values) & text.notna().to_numpy() & (text.str.strip() != "").fillna(False).to_numpy()
    if bad.any():
        rows = frame["source_row"].to_numpy()[bad]
        example = text[bad].iloc[0]
        raise InputDataError(
            f"non-numeric value '{example}' in column {name} at line {format_rows(rows)}",
            file=path, fix="correct or blank those values (blank = missing)",
        )
    return values


class TimeSpec(Protocol):
    """How a file gives its times (e.g. potfield.config.TimeSection): plain values only."""

    format: str
    date: str | None


def convert_units(values: np.ndarray, factor: float) -> np.ndarray:
    """``values`` times ``factor``, the factor that takes the file's unit to potfield's
    (:func:`potfield.config.unit_factor`); unchanged when the factor is 1."""
    return values if factor == 1.0 else values * factor


def _parse_date(text: pd.Series) -> pd.Series:
    text = text.astype("string").str.strip()
    compact = text.str.fullmatch(r"\d{8}").fillna(False)
    text = text.where(~compact, text.str.slice(0, 4) + "-" + text.str.slice(4, 6) + "-" + text.str.slice(6, 8))
    text = text.str.replace("/", "-", regex=False)
    return pd.to_datetime(text, format="%Y-%m-%d", errors="coerce")


def parse_time(frame: pd.DataFrame, spec: TimeSpec, path: Path) -> np.ndarray:
    """Readings' times as datetime64[ns] (UTC, timezone-naive).

    Formats: ISO 8601 (``time`` column), ``date_seconds`` (``date`` column or ``spec.date`` plus
    seconds of day in ``time``), ``decimal_hours`` (hours of day in ``time``; a drop of more than
    12 h between consecutive readings is taken as a day roll-over).
    """
    if "time" not in frame:
        raise InputDataError("no input column is mapped to 'time'", file=path, key="input.columns.time",
                             fix='add time = "<your time column>" under [input.columns]')
    raw = frame["time"]
    if spec.format == "iso":
        text = raw.astype("string").str.strip()
        parsed = pd.to_datetime(text, utc=True, errors="coerce", format="ISO8601")
        result = parsed.dt.tz_convert(None).astype("datetime64[ns]").to_numpy()
        bad = np.isnat(result)
        example_source = text
    else:
        seconds = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
        if spec.format == "decimal_hours":
            hours = seconds
            jumps = np.zeros_like(hours)
            if hours.size > 1:
                drop = np.diff(hours) < -12.0
                jumps[1:] = np.cumsum(drop) * 24.0
            seconds = (hours + jumps) * 3600.0
        if "date" in frame:
            day = _parse_date(frame["date"]).astype("datetime64[ns]").to_numpy()
        elif spec.date:
            day = np.full(len(frame), np.datetime64(pd.Timestamp(spec.date).to_datetime64(), "ns"))
        else:
            raise InputDataError(
                f"time format '{spec.format}' needs a date", file=path, key="input.time.date",
                fix='map a date column (input.columns.date) or set date = "YYYY-MM-DD" under [input.time]',
            )
        ns = np.round(seconds * 1e9)
        good = np.isfinite(ns) & ~np.isnat(day)
        result = np.full(len(frame), np.datetime64("NaT"), dtype="datetime64[ns]")
        result[good] = day[good] + ns[good].astype("int64").astype("timedelta64[ns]")
        bad = np.isnat(result)
        example_source = raw.astype("string")
    if bad.any():
        rows = frame["source_row"].to_numpy()[bad]
        raise InputDataError(
            f"cannot read the time '{example_source[bad].iloc[0]}' as {spec.format} at line "
            f"{format_rows(rows)}", file=path,
            fix="use ISO 8601 (2024-05-01T10:00:00Z) or set [input.time] format to the one the file uses",
        )
    return result
