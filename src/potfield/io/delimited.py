"""Delimited-text readers (comma, semicolon, tab, whitespace; optionally gzip-compressed).

The reader maps the user's column names to canonical names, parses times, converts units and
reports every problem as one line naming the file, the line number and the fix. Line numbers
count from 1 at the top of the file (the header line included), as a text editor shows them.
"""

from __future__ import annotations

import bz2
import codecs
import csv
import gzip
import io
import lzma
import re
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

import numpy as np
import pandas as pd

from ..errors import ConfigError, InputDataError, format_rows

#: Columns that stay text.
TEXT_COLUMNS = {"line", "line_type", "station", "loop", "date", "time", "quality"}
#: Pass-through columns ([input] keep_columns) are read as text under this prefix.
KEEP_PREFIX = "raw_"
#: Compressed files read transparently (by suffix).
COMPRESSED_SUFFIXES = (".gz", ".bz2", ".xz", ".zip")


def _open_text(path: Path, encoding: str = "utf-8"):
    suffix = path.suffix.lower()
    if suffix == ".gz":
        return gzip.open(path, "rt", encoding=encoding, errors="replace")
    if suffix == ".bz2":
        return bz2.open(path, "rt", encoding=encoding, errors="replace")
    if suffix == ".xz":
        return lzma.open(path, "rt", encoding=encoding, errors="replace")
    if suffix == ".zip":
        try:
            archive = zipfile.ZipFile(path)
        except zipfile.BadZipFile:
            raise InputDataError(
                "not a readable zip archive", file=path, fix="check the file, or unpack it into raw/"
            ) from None
        members = [m for m in archive.namelist() if not m.endswith("/")]
        if len(members) != 1:
            raise InputDataError(
                f"zip archive holds {len(members)} files, not one",
                file=path,
                fix="zip one data file per archive, or unpack it into raw/",
            )
        return io.TextIOWrapper(archive.open(members[0]), encoding=encoding, errors="replace")
    return open(path, encoding=encoding, errors="replace")


def is_text_column(canon: str) -> bool:
    """True for canonical columns read as text (and pass-through ``raw_*`` columns)."""
    return canon in TEXT_COLUMNS or canon.startswith(KEEP_PREFIX)


#: A line under the header made of dashes or equals signs only (an underline).
_UNDERLINE = re.compile(r"^(?=.*[-=])[\s\-=_|+,;]+$")


@dataclass
class HeaderLayout:
    """Where the header and the data of a delimited file are (see :func:`locate_header`)."""

    text: str  #: the header line, comment character removed
    line: int  #: its 1-based line number
    skip: list[int]  #: 0-based line numbers pandas skips before the header
    data_line: int  #: 1-based line number of the first data line
    from_comment: bool  #: the header sits in the comment block: names are given to pandas
    underline: int | None = None  #: 0-based line number of a dash underline, skipped


def locate_header(
    path: Path, skip_rows: int = 0, comment: str | None = None, wanted=(), encoding: str = "utf-8"
) -> HeaderLayout:
    """Find the header line after ``skip_rows`` lines and a leading block of comment lines.

    Lines starting with ``comment`` (e.g. ``/`` or ``#``) before the data are skipped; when the
    first other line is data rather than the header (it holds none of the ``wanted`` column
    names while the last comment line does), the last comment line is the header (``/ X Y MAG``).
    A line of dashes under the header is skipped.
    """
    with _open_text(path, encoding) as handle:
        lines = []
        for _ in range(skip_rows + 400):  # the header is near the top
            line = handle.readline()
            if not line:
                break
            lines.append(line.rstrip("\r\n"))
    index = skip_rows
    block: list[int] = []
    if comment:
        while index < len(lines) and (lines[index].lstrip().startswith(comment) or not lines[index].strip()):
            content = lines[index].lstrip()[len(comment) :].strip()
            if content and not _UNDERLINE.match(content):
                block.append(index)  # a comment line with text (underlines are not headers)
            index += 1
    if index >= len(lines) and not block:
        if skip_rows:
            raise InputDataError(
                f"file has no header line after skipping {skip_rows} line(s)",
                file=path,
                fix="check input.skip_rows and that the right file is named",
            )
        raise InputDataError("file is empty", file=path, fix="check that the right file is named")
    first = lines[index] if index < len(lines) else ""
    from_comment = False
    if block:
        candidate = lines[block[-1]].lstrip()[len(comment) :].strip()

        def hits(text: str) -> int:
            tokens = {_normal(t) for t in re.split(r"[\s,;\t]+", text)}
            return sum(_normal(w) in tokens for w in wanted)

        if (
            hits(candidate) > hits(first)
            or index >= len(lines)
            or (hits(candidate) == hits(first) and _numeric_share(first) > 0.5 >= _numeric_share(candidate))
        ):
            from_comment = True  # the first other line is data: the header is commented out
    if from_comment:
        header_index = block[-1]
        text = lines[header_index].lstrip()[len(comment) :].strip()
        data = header_index + 1
    else:
        header_index, text, data = index, first, index + 1
    while (
        data < len(lines)
        and comment
        and (lines[data].lstrip().startswith(comment) or not lines[data].strip())
    ):
        data += 1  # comment (or blank) lines between a commented header and the data
    underline = None
    if data < len(lines) and lines[data].strip() and _UNDERLINE.match(lines[data]):
        underline, data = data, data + 1
    skip = [i for i in range(header_index) if not from_comment]
    return HeaderLayout(
        text=text,
        line=header_index + 1,
        skip=skip,
        data_line=data + 1,
        from_comment=from_comment,
        underline=underline,
    )


def _numeric_share(text: str) -> float:
    """Fraction of the fields of a line that are numbers (a data line is mostly numbers)."""
    tokens = [t for t in re.split(r"[\s,;\t]+", text.strip()) if t]
    numbers = sum(bool(re.fullmatch(r"[-+]?(\d+[.,]?\d*|[.,]\d+)([eEdD][-+]?\d+)?", t)) for t in tokens)
    return numbers / len(tokens) if tokens else 0.0


def _normal(name: str) -> str:
    """Column name folded for a tolerant match: case, spaces, dashes and underscores ignored."""
    return re.sub(r"[\s\-_]+", "", str(name)).casefold()


def match_columns(header: list[str], wanted) -> dict[str, str]:
    """Each wanted name -> the header name it matches: exactly, else the one header name equal
    to it ignoring case, spaces, dashes and underscores (``Mag-Total`` ~ ``mag_total``)."""
    found = {}
    folded: dict[str, list[str]] = {}
    for h in header:
        folded.setdefault(_normal(h), []).append(h)
    for name in wanted:
        if name in header:
            found[name] = name
        elif len(folded.get(_normal(name), [])) == 1:
            found[name] = folded[_normal(name)][0]
    return found


def _open_binary(path: Path):
    """The file's bytes, decompressed (.gz, .bz2, .xz, .zip, .zst as pandas infers)."""
    from pandas.io.common import get_handle

    return get_handle(path, "rb", compression="infer", is_text=False)


#: Bytes read per block when scanning a file (bounded memory on very large files).
SCAN_BLOCK = 1 << 23


def _decode_failure(path: Path, encoding: str) -> tuple[int, int, int] | None:
    """Line number, byte offset and value of the first byte that ``encoding`` cannot decode
    (None when the whole file decodes). One streaming pass, bounded memory."""
    decoder = codecs.getincrementaldecoder(encoding)()
    # ASCII blocks decode in any ASCII-compatible codec: skip them (bytes.isascii is fast)
    ascii_safe = "a".encode(encoding) == b"a" and "\n".encode(encoding) == b"\n"
    offset, lines = 0, 0
    with _open_binary(path) as handle:
        while block := handle.handle.read(SCAN_BLOCK):
            if ascii_safe and block.isascii() and not decoder.getstate()[0]:
                offset += len(block)
                lines += block.count(b"\n")
                continue
            try:
                decoder.decode(block)
            except UnicodeDecodeError as err:
                # the incremental decoder may hold back a partial character from the block before
                start = max(err.start - len(err.object) + len(block), 0)
                return lines + block.count(b"\n", 0, start) + 1, offset + start, block[start]
            offset += len(block)
            lines += block.count(b"\n")
        try:
            decoder.decode(b"", final=True)
        except UnicodeDecodeError:
            return lines + 1, max(offset - 1, 0), 0
    return None


def _field_counts(path: Path, sep: str, skip_rows: int, encoding: str):
    """Yield (line numbers, field counts) of the non-blank lines after the header, by blocks.

    Counts delimiters per line on the raw bytes (vectorised, one block of lines at a time), so
    a row with more or fewer fields than the header is found without parsing the values.
    """
    try:
        sep_b = b" " if sep == "whitespace" else sep.encode(encoding)
        newline = "\n".encode(encoding)
    except (UnicodeEncodeError, LookupError):
        return
    if len(sep_b) != 1 or newline != b"\n":
        return  # multi-byte delimiters or encodings (UTF-16): left to the parser
    code = sep_b[0]
    consumed, rest = 0, b""
    with _open_binary(path) as handle:
        while True:
            block = handle.handle.read(SCAN_BLOCK)
            data = rest + block
            if not block:
                if not data:
                    break
                if not data.endswith(b"\n"):
                    data += b"\n"
                cut = len(data)
            else:
                cut = data.rfind(b"\n") + 1
                if cut == 0:
                    rest = data
                    continue
            chunk, rest = data[:cut], data[cut:]
            arr = np.frombuffer(chunk, dtype=np.uint8)
            ends = np.flatnonzero(arr == 10)
            if sep == "whitespace":
                space = (arr == 32) | (arr == 9) | (arr == 13) | (arr == 10)
                solid = np.cumsum(~space, dtype=np.int64)[ends]
                nonblank = np.diff(np.r_[0, solid]) > 0
                starts = np.flatnonzero(~space & np.r_[True, space[:-1]])
                counts = np.diff(np.r_[0, np.searchsorted(starts, ends)])
            else:
                # a line is blank when it holds nothing but an optional carriage return
                length = np.diff(np.r_[-1, ends]) - 1
                nonblank = (length > 1) | ((length == 1) & (arr[np.maximum(ends - 1, 0)] != 13))
                counts = np.diff(np.r_[0, np.searchsorted(np.flatnonzero(arr == code), ends)]) + 1
            numbers = consumed + 1 + np.arange(ends.size)
            consumed += ends.size
            keep = nonblank & (numbers > skip_rows)
            yield numbers[keep], counts[keep], chunk, ends, consumed - ends.size
            if not block:
                break


def _ragged_row(path: Path, sep: str, skip_rows: int, encoding: str) -> tuple[int, int, int, int] | None:
    """The first data line whose field count differs from the header's.

    Returns (line number, its field count, the header's field count, how many such lines) or
    None. Lines flagged by the byte count are confirmed with :mod:`csv` (quoted delimiters).
    """
    header = None
    found = None
    others = 0
    for numbers, counts, chunk, ends, first in _field_counts(path, sep, skip_rows, encoding):
        if numbers.size == 0:
            continue
        if header is None:
            header = int(counts[0])
            numbers, counts = numbers[1:], counts[1:]
        bad = np.flatnonzero(counts != header)
        if bad.size == 0:
            continue
        if found is not None:
            others += bad.size
            continue
        for i in bad[:50]:
            number = int(numbers[i])
            if sep != "whitespace":
                j = number - first - 1
                begin = 0 if j == 0 else int(ends[j - 1]) + 1
                text = chunk[begin : int(ends[j])].decode(encoding, errors="replace").rstrip("\r")
                fields = len(next(csv.reader([text], delimiter=sep), []))
                if fields == header:
                    continue  # a quoted delimiter: not ragged
            else:
                fields = int(counts[i])
            if found is None:
                found = (number, fields)
            else:
                others += 1
        others += max(bad.size - 50, 0)
    if found is None:
        return None
    return found[0], found[1], header, others


def sniff_delimiter(path: Path, skip_rows: int = 0, encoding: str = "utf-8") -> str:
    """Guess the delimiter from the header line: ``,`` ``;`` tab or whitespace."""
    with _open_text(path, encoding) as handle:
        for _ in range(skip_rows):
            handle.readline()
        header = handle.readline()
    return _sniff(header, path, skip_rows)


def _sniff(header: str, path: Path, skip_rows: int = 0) -> str:
    if not header.strip():
        if skip_rows:
            raise InputDataError(
                f"file has no header line after skipping {skip_rows} line(s)",
                file=path,
                fix="check input.skip_rows and that the right file is named",
            )
        raise InputDataError("file is empty", file=path, fix="check that the right file is named")
    for candidate in (",", ";", "\t"):
        if candidate in header:
            return candidate
    return "whitespace"


def read_delimited(
    path: Path,
    *,
    columns: dict[str, str],
    delimiter: str = "auto",
    skip_rows: int = 0,
    missing_values=(),
    required=(),
    encoding: str = "utf-8",
    encoding_key: str = "input.encoding",
    columns_key: str = "input.columns",
    comment: str | None = None,
    decimal: str = ".",
) -> pd.DataFrame:
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
    encoding : str
        Text encoding of the file. When the default ``"utf-8"`` cannot decode it, the file is
        read as latin-1 (every byte is a character there) and ``frame.attrs["warnings"]`` says
        so; another declared encoding that fails is an error naming the line and byte offset.
    encoding_key, columns_key : str
        survey.toml keys of the encoding and of the column mapping, for messages.
    comment : str, optional
        Leading lines starting with it are skipped; the header may be the last of them
        (:func:`locate_header`).
    decimal : str
        Decimal mark of the numbers (``","`` for decimal commas).

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
                f"no input column is mapped to '{name}'",
                file=path,
                key=f"{columns_key}.{name}",
                fix=f'add {name} = "<your column>" under [{columns_key}]',
            )
    if path.suffix.lower() == ".zip":
        _open_text(path).close()  # one member, or a one-line error naming the archive
    try:
        failure = _decode_failure(path, encoding)
    except (OSError, EOFError, ValueError) as err:  # a damaged compressed file
        raise InputDataError(
            f"cannot read the file ({_first_line(err)})",
            file=path,
            fix="check that the file is complete (re-copy or re-compress it)",
        ) from None
    if failure is None:
        return _read_delimited(
            path, columns, delimiter, skip_rows, missing_values, encoding, columns_key, comment, decimal
        )
    line, offset, byte = failure
    if codecs.lookup(encoding).name != "utf-8":
        raise InputDataError(
            f"line {line} (byte offset {offset}): byte 0x{byte:02x} is not {encoding} text",
            file=path,
            key=encoding_key,
            fix="set the encoding the file was written in (e.g. utf-8, latin-1, cp1252)",
        )
    frame = _read_delimited(
        path, columns, delimiter, skip_rows, missing_values, "latin-1", columns_key, comment, decimal
    )
    frame.attrs["warnings"] = [
        f"{path.name}: not valid UTF-8 (byte 0x{byte:02x} at line {line}, byte offset {offset}); "
        f"read as latin-1 -- check the text columns, or declare the file's encoding with "
        f"{encoding_key}"
    ]
    return frame


def _read_delimited(
    path: Path,
    columns: dict[str, str],
    delimiter: str,
    skip_rows: int,
    missing_values,
    encoding: str,
    columns_key: str = "input.columns",
    comment: str | None = None,
    decimal: str = ".",
) -> pd.DataFrame:
    wanted = list(dict.fromkeys(columns.values()))
    layout = locate_header(path, skip_rows, comment, wanted, encoding)
    plain = not layout.from_comment and layout.line == skip_rows + 1 and layout.underline is None
    sep = _sniff(layout.text, path, skip_rows) if delimiter == "auto" else delimiter
    if decimal != "." and sep == decimal:
        raise ConfigError(
            f"the delimiter and the decimal mark are both '{decimal}'",
            file=path,
            fix="set the delimiter (';', tab or whitespace) the file uses",
        )
    skip = skip_rows if plain else layout.skip + ([layout.underline] if layout.underline is not None else [])
    try:
        if layout.from_comment:
            parts = layout.text.split() if sep == "whitespace" else layout.text.split(sep)
            header = [p.strip().strip('"') for p in parts]
        elif sep == "whitespace":
            header = pd.read_csv(path, sep=r"\s+", nrows=0, skiprows=skip, encoding=encoding).columns
        else:
            header = pd.read_csv(path, sep=sep, nrows=0, skiprows=skip, encoding=encoding).columns
    except pd.errors.EmptyDataError:
        where = f" after skipping {skip_rows} line(s)" if skip_rows else ""
        raise InputDataError(
            f"file has no header line{where}",
            file=path,
            fix="check that the right file is named and input.skip_rows",
        ) from None
    except (pd.errors.ParserError, ValueError, csv.Error) as err:
        if isinstance(err, UnicodeDecodeError):
            raise
        raise InputDataError(
            f"cannot read the header line {layout.line} ({_first_line(err)})",
            file=path,
            fix="check the delimiter and input.skip_rows",
        ) from None
    header = [str(h).strip() for h in header]
    found = match_columns(header, wanted)
    missing = [c for c in wanted if c not in found]
    if missing:
        canon = [k for k, v in columns.items() if v == missing[0]][0]
        key = "input.keep_columns" if canon.startswith(KEEP_PREFIX) else f"{columns_key}.{canon}"
        raise InputDataError(
            f"column '{missing[0]}' (mapped to {canon}) is not in the file; its columns are: "
            f"{', '.join(header[:20])}",
            file=path,
            key=key,
            fix=f"correct the column name under [{columns_key}]",
        )
    columns = {canon: found[col] for canon, col in columns.items()}
    wanted = list(dict.fromkeys(columns.values()))
    kwargs = dict(
        skiprows=skip,
        na_values=list(missing_values),
        keep_default_na=True,
        encoding=encoding,
        dtype={c: str for c, canon in ((v, k) for k, v in columns.items()) if is_text_column(canon)},
    )
    if decimal != ".":
        kwargs["decimal"] = decimal
    if layout.from_comment:
        kwargs.update(header=None, names=header, skiprows=layout.data_line - 1)

    def refuse_ragged() -> None:
        # pandas' C parser fills short rows with NaN silently; pyarrow refuses them (and then
        # this runs before the fallback), so the byte scan is only needed off the pyarrow path
        ragged = _ragged_row(path, sep, skip_rows, encoding) if plain else None
        if ragged is not None:
            line, fields, expected, others = ragged
            more = f" (and {others} more such line(s))" if others else ""
            raise InputDataError(
                f"line {line} has {fields} field(s) but the header line {skip_rows + 1} has {expected}{more}",
                file=path,
                fix="give every row the header's fields (empty = missing), or check the delimiter",
            )

    try:
        if sep == "whitespace":
            refuse_ragged()
            frame = pd.read_csv(path, sep=r"\s+", usecols=lambda c: str(c).strip() in wanted, **kwargs)
        elif (
            len(sep) == 1
            and not skip_rows
            and plain
            and decimal == "."
            and path.suffix.lower() not in COMPRESSED_SUFFIXES
        ):
            try:  # pyarrow's reader is several times faster on large files
                frame = pd.read_csv(path, sep=sep, usecols=wanted, engine="pyarrow", **kwargs)
            except (ValueError, TypeError, KeyError):
                refuse_ragged()
                frame = pd.read_csv(path, sep=sep, usecols=lambda c: str(c).strip() in wanted, **kwargs)
        else:
            refuse_ragged()
            frame = pd.read_csv(path, sep=sep, usecols=lambda c: str(c).strip() in wanted, **kwargs)
    except (pd.errors.ParserError, ValueError, csv.Error, OverflowError) as err:
        if isinstance(err, UnicodeDecodeError):
            raise
        raise InputDataError(
            f"cannot parse the file ({_first_line(err)})",
            file=path,
            fix="check the delimiter and that every line has the same fields",
        ) from None
    frame.columns = [str(c).strip() for c in frame.columns]
    if frame.empty:
        raise InputDataError(
            "file has a header but no data rows", file=path, fix="check that the right file is named"
        )
    out = pd.DataFrame(index=pd.RangeIndex(len(frame)))
    for canon, col in columns.items():
        out[canon] = frame[col].to_numpy()
    out["source_file"] = path.name
    out["source_row"] = np.arange(len(frame), dtype=np.int64) + layout.data_line
    return out


def _first_line(err: Exception) -> str:
    text = str(err).strip()
    return text.splitlines()[0] if text else type(err).__name__


def to_numeric(frame: pd.DataFrame, name: str, path: Path) -> np.ndarray:
    """Column ``name`` as float; non-numeric entries are an error naming their line numbers."""
    col = frame[name]
    if pd.api.types.is_bool_dtype(col.dtype):
        col = col.astype(object).astype("string")
    if pd.api.types.is_numeric_dtype(col.dtype):
        values = col.to_numpy(dtype=float)
    else:
        values = pd.to_numeric(col, errors="coerce").to_numpy(dtype=float)
        text = col.astype("string")
        bad = np.isnan(values) & text.notna().to_numpy() & (text.str.strip() != "").fillna(False).to_numpy()
        if bad.any():
            rows = frame["source_row"].to_numpy()[bad]
            example = text[bad].iloc[0]
            raise InputDataError(
                f"non-numeric value '{example}' in column {name} at line {format_rows(rows)}",
                file=path,
                fix="correct or blank those values (blank = missing)",
            )
    infinite = np.isinf(values)
    if infinite.any():
        rows = frame["source_row"].to_numpy()[infinite]
        raise InputDataError(
            f"value {values[infinite][0]:g} in column {name} at line {format_rows(rows)} is not a "
            "finite number",
            file=path,
            fix="correct or blank those values (blank = missing)",
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


def parse_time(
    frame: pd.DataFrame, spec: TimeSpec, path: Path, names: dict | None = None, key: str = "input.time"
) -> np.ndarray:
    """Readings' times as datetime64[ns] (UTC, timezone-naive); the layouts are those of
    :mod:`potfield.io.timefmt` (ISO 8601, date + seconds of day, decimal hours, strftime
    patterns, separate date and time columns, UTC offsets, clock offsets)."""
    from .timefmt import parse_times

    try:
        if _legacy_layout(frame, spec):
            return _parse_time(frame, spec, path)
        return parse_times(frame, spec, path, names=names, key=key)
    except (ValueError, OverflowError, pd.errors.OutOfBoundsDatetime) as err:
        # pandas' DateParseError and OutOfBoundsDatetime are ValueErrors
        if isinstance(err, InputDataError):
            raise
        raise InputDataError(
            f"cannot read the times as {spec.format} ({_first_line(err)})",
            file=path,
            fix="check the time column and [input.time] format",
        ) from None


def _legacy_layout(frame: pd.DataFrame, spec) -> bool:
    """True for the three named layouts without the options of :mod:`potfield.io.timefmt`
    (pattern, date pattern, UTC offset, time zone, clock offset, ISO times of day with a date
    column): read by :func:`_parse_time`, which bounds the offsets and out-of-range years."""
    if spec.format not in ("iso", "date_seconds", "decimal_hours"):
        return False
    if any(
        getattr(spec, name, None) for name in ("date_format", "utc_offset_h", "timezone", "clock_offset_s")
    ):
        return False
    return not (spec.format == "iso" and "date" in frame)


def _parse_date(text: pd.Series) -> pd.Series:
    text = text.astype("string").str.strip()
    compact = text.str.fullmatch(r"\d{8}").fillna(False)
    text = text.where(
        ~compact, text.str.slice(0, 4) + "-" + text.str.slice(4, 6) + "-" + text.str.slice(6, 8)
    )
    text = text.str.replace("/", "-", regex=False)
    return pd.to_datetime(_drop_out_of_range_years(text), format="%Y-%m-%d", errors="coerce")


def _drop_out_of_range_years(text: pd.Series) -> pd.Series:
    """Dates whose year datetime64[ns] cannot hold (outside 1678..2261) as missing, so they are
    reported as unreadable at their lines (pandas raises on them even with errors="coerce")."""
    year = pd.to_numeric(text.str.extract(r"^\s*([+-]?\d{4,})-", expand=False), errors="coerce")
    return text.where(~((year < 1678) | (year > 2261)).fillna(False).astype(bool), pd.NA)


#: Largest |offset| (s) from the date accepted in date_seconds/decimal_hours times (400 days):
#: keeps the nanosecond arithmetic far from int64 overflow.
MAX_SECONDS = 400 * 86400.0


def _iso_times_fast(raw: pd.Series) -> np.ndarray | None:
    """ISO 8601 times parsed by Arrow's C++ parser, when every value is a plain timestamp, all
    with a UTC designator or offset (``2024-11-18T22:30:00.100Z``) or all without (taken as
    UTC, as the general path does); None otherwise, and the general path reads them and names
    the rows it cannot read. At 1e7 readings the general path took 17.5 s and 1.8 GB of string
    copies."""
    import pyarrow as pa
    import pyarrow.compute as pc

    try:
        text = pa.array(raw, type=pa.string(), from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return None
    if text.null_count or len(text) == 0:
        return None

    def cast(target):  # None: not every value is a timestamp of this kind
        try:
            return pc.cast(text, target)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            return None

    parsed = cast(pa.timestamp("ns", tz="UTC"))
    if parsed is None:
        parsed = cast(pa.timestamp("ns"))
    if parsed is None:
        return None
    return parsed.cast(pa.int64()).to_numpy(zero_copy_only=False).view("datetime64[ns]")


def _parse_time(frame: pd.DataFrame, spec: TimeSpec, path: Path) -> np.ndarray:
    if "time" not in frame:
        raise InputDataError(
            "no input column is mapped to 'time'",
            file=path,
            key="input.columns.time",
            fix='add time = "<your time column>" under [input.columns]',
        )
    raw = frame["time"]
    if spec.format == "iso" and (fast := _iso_times_fast(raw)) is not None:
        return fast
    if spec.format == "iso":
        text = raw.astype("string").str.strip()
        # years pandas cannot hold in datetime64[ns] (1677-09-21..2262-04-11) become NaT first:
        # to_datetime raises on them even with errors="coerce"
        text = _drop_out_of_range_years(text)
        parsed = pd.to_datetime(text, utc=True, errors="coerce", format="ISO8601")
        result = parsed.dt.tz_convert(None).astype("datetime64[ns]").to_numpy()
        bad = np.isnat(result)
        example_source = raw.astype("string").str.strip() if bad.any() else None
    else:
        seconds = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
        if spec.format == "decimal_hours":
            hours = seconds
            jumps = np.zeros_like(hours)
            if hours.size > 1:
                drop = np.diff(hours) < -12.0
                jumps[1:] = np.cumsum(drop) * 24.0
            seconds = (hours + jumps) * 3600.0
        elif (
            over := np.isfinite(seconds)
            & (np.abs(seconds) <= MAX_SECONDS)
            & ((seconds < 0) | (seconds > 86400.0))
        ).any():
            rows = frame["source_row"].to_numpy()[over]
            raise InputDataError(
                f"time {raw[over].iloc[0]} is not seconds of day (0..86,400) as date_seconds at line "
                f"{format_rows(rows)}",
                file=path,
                fix="if it is hhmmss (120204 = 12:02:04) set [input.time] format = '%H%M%S'",
            )
        if "date" in frame:
            day = _parse_date(frame["date"]).astype("datetime64[ns]").to_numpy()
        elif spec.date:
            day = np.full(len(frame), np.datetime64(pd.Timestamp(spec.date).to_datetime64(), "ns"))
        else:
            raise InputDataError(
                f"time format '{spec.format}' needs a date",
                file=path,
                key="input.time.date",
                fix='map a date column (input.columns.date) or set date = "YYYY-MM-DD" under [input.time]',
            )
        ns = np.round(seconds * 1e9)
        good = np.isfinite(ns) & (np.abs(seconds) <= MAX_SECONDS) & ~np.isnat(day)
        day_ns = day.astype("int64").astype(float)
        good &= np.abs(day_ns + np.where(good, ns, 0.0)) < 9.2e18  # inside datetime64[ns]
        result = np.full(len(frame), np.datetime64("NaT"), dtype="datetime64[ns]")
        result[good] = day[good] + ns[good].astype("int64").astype("timedelta64[ns]")
        bad = np.isnat(result)
        example_source = raw.astype("string")
        if "date" in frame:
            example_source = frame["date"].astype("string").str.strip() + " " + example_source
    if bad.any():
        rows = frame["source_row"].to_numpy()[bad]
        raise InputDataError(
            f"cannot read the time '{example_source[bad].iloc[0]}' as {spec.format} at line "
            f"{format_rows(rows)}",
            file=path,
            fix="use ISO 8601 (2024-05-01T10:00:00Z) or set [input.time] format to the one the file uses",
        )
    return result
