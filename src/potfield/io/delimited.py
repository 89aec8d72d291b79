"""Delimited-text readers (comma, semicolon, tab, whitespace; optionally compressed: .gz, .bz2,
.xz, or a .zip holding one file).

The reader maps the user's column names to canonical names, parses times, converts units and
reports every problem as one line naming the file, the line number and the fix. Line numbers
count from 1 at the top of the file (the header line included), as a text editor shows them.
"""

from __future__ import annotations

import bz2
import gzip
import io
import lzma
import re
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..config import COLUMN_QUANTITY, UNIT_FACTORS, TimeSection
from ..errors import ConfigError, InputDataError, format_rows

#: Columns that stay text.
TEXT_COLUMNS = {"line", "line_type", "station", "loop", "date", "time", "quality"}
#: Pass-through columns ([input] keep_columns) are read as text under this prefix.
KEEP_PREFIX = "raw_"
#: Compressed files read transparently (by suffix).
COMPRESSED_SUFFIXES = (".gz", ".bz2", ".xz", ".zip")


def _open_text(path: Path):
    suffix = path.suffix.lower()
    if suffix == ".gz":
        return gzip.open(path, "rt", encoding="utf-8", errors="replace")
    if suffix == ".bz2":
        return bz2.open(path, "rt", encoding="utf-8", errors="replace")
    if suffix == ".xz":
        return lzma.open(path, "rt", encoding="utf-8", errors="replace")
    if suffix == ".zip":
        try:
            archive = zipfile.ZipFile(path)
        except zipfile.BadZipFile:
            raise InputDataError("not a readable zip archive", file=path,
                                 fix="check the file, or unpack it into raw/") from None
        members = [m for m in archive.namelist() if not m.endswith("/")]
        if len(members) != 1:
            raise InputDataError(f"zip archive holds {len(members)} files, not one", file=path,
                                 fix="zip one data file per archive, or unpack it into raw/")
        return io.TextIOWrapper(archive.open(members[0]), encoding="utf-8", errors="replace")
    return open(path, encoding="utf-8", errors="replace")


def is_text_column(canon: str) -> bool:
    """True for canonical columns read as text (and pass-through ``raw_*`` columns)."""
    return canon in TEXT_COLUMNS or canon.startswith(KEEP_PREFIX)


#: A line under the header made of dashes or equals signs only (an underline).
_UNDERLINE = re.compile(r"^(?=.*[-=])[\s\-=_|+,;]+$")


@dataclass
class HeaderLayout:
    """Where the header and the data of a delimited file are (see :func:`locate_header`)."""

    text: str            #: the header line, comment character removed
    line: int            #: its 1-based line number
    skip: list[int]      #: 0-based line numbers pandas skips before the header
    data_line: int       #: 1-based line number of the first data line
    from_comment: bool   #: the header sits in the comment block: names are given to pandas
    underline: int | None = None  #: 0-based line number of a dash underline, skipped


def locate_header(path: Path, skip_rows: int = 0, comment: str | None = None,
                  wanted=()) -> HeaderLayout:
    """Find the header line after ``skip_rows`` lines and a leading block of comment lines.

    Lines starting with ``comment`` (e.g. ``/`` or ``#``) before the data are skipped; when the
    first other line is data rather than the header (it holds none of the ``wanted`` column
    names while the last comment line does), the last comment line is the header (``/ X Y MAG``).
    A line of dashes under the header is skipped.
    """
    with _open_text(path) as handle:
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
            content = lines[index].lstrip()[len(comment):].strip()
            if content and not _UNDERLINE.match(content):
                block.append(index)  # a comment line with text (underlines are not headers)
            index += 1
    if index >= len(lines) and not block:
        raise InputDataError("file is empty", file=path, fix="check that the right file is named")
    first = lines[index] if index < len(lines) else ""
    from_comment = False
    if block:
        candidate = lines[block[-1]].lstrip()[len(comment):].strip()

        def hits(text: str) -> int:
            tokens = {_normal(t) for t in re.split(r"[\s,;\t]+", text)}
            return sum(_normal(w) in tokens for w in wanted)

        if hits(candidate) > hits(first) or index >= len(lines) or (
                hits(candidate) == hits(first) and _numeric_share(first) > 0.5 >= _numeric_share(candidate)):
            from_comment = True  # the first other line is data: the header is commented out
    if from_comment:
        header_index = block[-1]
        text = lines[header_index].lstrip()[len(comment):].strip()
        data = header_index + 1
    else:
        header_index, text, data = index, first, index + 1
    while data < len(lines) and comment and (lines[data].lstrip().startswith(comment) or not lines[data].strip()):
        data += 1  # comment (or blank) lines between a commented header and the data
    underline = None
    if data < len(lines) and lines[data].strip() and _UNDERLINE.match(lines[data]):
        underline, data = data, data + 1
    skip = [i for i in range(header_index) if not from_comment]
    return HeaderLayout(text=text, line=header_index + 1, skip=skip, data_line=data + 1,
                        from_comment=from_comment, underline=underline)


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


def sniff_delimiter(path: Path, skip_rows: int = 0) -> str:
    """Guess the delimiter from the header line: ``,`` ``;`` tab or whitespace."""
    with _open_text(path) as handle:
        for _ in range(skip_rows):
            handle.readline()
        header = handle.readline()
    return _sniff(header, path)


def _sniff(header: str, path: Path) -> str:
    if not header.strip():
        raise InputDataError("file is empty", file=path, fix="check that the right file is named")
    for candidate in (",", ";", "\t"):
        if candidate in header:
            return candidate
    return "whitespace"


def read_delimited(path: Path, *, columns: dict[str, str], delimiter: str = "auto",
                   skip_rows: int = 0, missing_values=(), required=(), comment: str | None = None,
                   decimal: str = ".") -> pd.DataFrame:
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
                f"no input column is mapped to '{name}'", file=path, key=f"input.columns.{name}",
                fix=f"add {name} = \"<your column>\" under [input.columns]",
            )
    wanted = list(dict.fromkeys(columns.values()))
    layout = locate_header(path, skip_rows, comment, wanted)
    plain = not layout.from_comment and layout.line == skip_rows + 1 and layout.underline is None
    sep = _sniff(layout.text, path) if delimiter == "auto" else delimiter
    if decimal != "." and sep == decimal:
        raise ConfigError(f"the delimiter and the decimal mark are both '{decimal}'", file=path,
                          fix="set the delimiter (';', tab or whitespace) the file uses")
    skip = skip_rows if plain else layout.skip + ([layout.underline] if layout.underline is not None else [])
    try:
        if layout.from_comment:
            parts = layout.text.split() if sep == "whitespace" else layout.text.split(sep)
            header = [p.strip().strip('"') for p in parts]
        elif sep == "whitespace":
            header = pd.read_csv(path, sep=r"\s+", nrows=0, skiprows=skip).columns
        else:
            header = pd.read_csv(path, sep=sep, nrows=0, skiprows=skip).columns
    except pd.errors.EmptyDataError:
        raise InputDataError("file is empty", file=path, fix="check that the right file is named") from None
    header = [str(h).strip() for h in header]
    found = match_columns(header, wanted)
    missing = [c for c in wanted if c not in found]
    if missing:
        canon = [k for k, v in columns.items() if v == missing[0]][0]
        raise InputDataError(
            f"column '{missing[0]}' (mapped to {canon}) is not in the file; its columns are: "
            f"{', '.join(header[:20])}", file=path,
            key="input.keep_columns" if canon.startswith(KEEP_PREFIX) else f"input.columns.{canon}",
            fix="correct the column name under [input.columns]",
        )
    columns = {canon: found[col] for canon, col in columns.items()}
    wanted = list(dict.fromkeys(columns.values()))
    kwargs = dict(skiprows=skip, na_values=list(missing_values), keep_default_na=True,
                  dtype={c: str for c, canon in ((v, k) for k, v in columns.items())
                         if is_text_column(canon)})
    if decimal != ".":
        kwargs["decimal"] = decimal
    if layout.from_comment:
        kwargs.update(header=None, names=header, skiprows=layout.data_line - 1)
    try:
        if sep == "whitespace":
            frame = pd.read_csv(path, sep=r"\s+", usecols=lambda c: str(c).strip() in wanted, **kwargs)
        elif (len(sep) == 1 and not skip_rows and plain and decimal == "."
              and path.suffix.lower() not in COMPRESSED_SUFFIXES):
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
    out["source_row"] = np.arange(len(frame), dtype=np.int64) + layout.data_line
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


def convert_units(values: np.ndarray, name: str, units: dict[str, str]) -> np.ndarray:
    """Multiply by the factor that takes the declared unit to potfield's unit for ``name``."""
    quantity = COLUMN_QUANTITY.get(name)
    if quantity is None or name not in units:
        return values
    return values * UNIT_FACTORS[quantity][units[name]]


def parse_time(frame: pd.DataFrame, spec: TimeSection, path: Path, names: dict | None = None,
               key: str = "input.time") -> np.ndarray:
    """Readings' times as datetime64[ns] (UTC, timezone-naive); see :mod:`potfield.io.timefmt`."""
    from .timefmt import parse_times

    return parse_times(frame, spec, path, names=names, key=key)
