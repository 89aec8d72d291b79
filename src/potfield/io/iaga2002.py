"""IAGA-2002 exchange format: reader, writer and the observatory readings table.

The format (IAGA Working Group V-DAT, "IAGA-2002 Data Exchange Format", as published by
IAGA/INTERMAGNET and NOAA-NCEI) is plain text of 70-character records:

* header records: a space in column 1, the label from column 2, the value from column 25 and
  ``|`` in column 70. Twelve are mandatory -- Format, Source of Data, Station Name, IAGA CODE,
  Geodetic Latitude, Geodetic Longitude, Elevation, Reported, Sensor Orientation, Digital
  Sampling, Data Interval Type, Data Type -- and "Publication Date" is optional;
* comment records: `` #`` in columns 1-2, ``|`` in column 70;
* the data header: ``DATE       TIME         DOY`` and four column labels (IAGA code followed by
  the element letter), ending in ``|``;
* data records: ``YYYY-MM-DD hh:mm:ss.sss DDD`` followed by exactly four ``%10.2f`` values.

Elements: X (north), Y (east), Z (down), H (horizontal intensity), F (total field, scalar
instrument), S (total field from an independent scalar instrument), G (Delta F), D
(declination) and I (inclination); all intensities in nT, D and I in minutes of arc. Values of
88888 or more are sentinels: 99999 means missing and 88888 "not recorded" (written as .00, .88
or .99); they are read as NaN.

Delta F (element G) is defined in the format description as ``G = F(v) - F(s)``: the total field
computed from the vector components minus the one measured by the scalar instrument (from memory
of the IAGA-2002 description and the INTERMAGNET Technical Manual; St-Louis (ed.) 2012,
INTERMAGNET Technical Reference Manual v4.6). Hence ``F(s) = sqrt(X^2 + Y^2 + Z^2) - G``.

Heights: the format gives Elevation in metres above mean sea level. :func:`observatory_table`
adds a geoid undulation N (default 0, i.e. the elevation is treated as an ellipsoidal height;
the error is the local geoid height, at most about 100 m, about 2-3 nT in IGRF, well below the
model's own uncertainty).
"""

from __future__ import annotations

import io
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputDataError
from .atomic import write_text

#: Header labels of the format description (lower case, single spaces) -> canonical key.
HEADER_KEYS = {
    "format": "format",
    "source of data": "source",
    "station name": "station_name",
    "iaga code": "iaga_code",
    "geodetic latitude": "latitude",
    "geodetic longitude": "longitude",
    "elevation": "elevation",
    "reported": "reported",
    "sensor orientation": "sensor_orientation",
    "digital sampling": "digital_sampling",
    "data interval type": "interval_type",
    "data type": "data_type",
    "publication date": "publication_date",
}
#: Canonical key -> label as written (the format description's spelling), in file order.
HEADER_LABELS = {
    "format": "Format",
    "source": "Source of Data",
    "station_name": "Station Name",
    "iaga_code": "IAGA CODE",
    "latitude": "Geodetic Latitude",
    "longitude": "Geodetic Longitude",
    "elevation": "Elevation",
    "reported": "Reported",
    "sensor_orientation": "Sensor Orientation",
    "digital_sampling": "Digital Sampling",
    "interval_type": "Data Interval Type",
    "data_type": "Data Type",
    "publication_date": "Publication Date",
}
#: Elements the format knows (see the module docstring).
ELEMENTS = set("XYZHFSGDIE")
#: Values at or above this are missing/not-recorded sentinels.
SENTINEL_MIN = 88888.0
#: Value written for NaN.
MISSING = 99999.0
RECORD_LENGTH = 70
_NUMERIC_KEYS = ("latitude", "longitude", "elevation")


@dataclass
class IagaRecord:
    """One IAGA-2002 file.

    Attributes
    ----------
    header : dict
        Canonical keys (see :data:`HEADER_KEYS`) -> text value; ``latitude``, ``longitude``
        and ``elevation`` as floats (NaN when blank). Unknown labels are kept under their
        lower-case, underscore-joined label.
    comments : list of str
        Comment records without the leading ``#`` and the trailing ``|``, stripped.
    data : pandas.DataFrame
        ``time`` (datetime64[ns], UTC, naive), one column per element letter in file order
        (sentinels as NaN; D and I in minutes of arc as in the file), ``declination_deg`` /
        ``inclination_deg`` when D / I are present, and the derived canonical columns
        ``mag_north``, ``mag_east``, ``mag_down``, ``total_field`` (nT; NaN where the elements
        do not determine them).
    elements : str
        Element letters of the four data columns, from the data header.
    rows : numpy.ndarray
        1-based line number in the file of each data record (same order as ``data``).
    path : Path or None
    warnings : list of str
    """

    header: dict
    comments: list[str]
    data: pd.DataFrame
    elements: str
    rows: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    path: Path | None = None
    warnings: list[str] = field(default_factory=list)

    @property
    def code(self) -> str:
        return str(self.header.get("iaga_code", "")).strip().upper()


def _fail(path, line_no: int, message: str, fix: str):
    raise InputDataError(f"line {line_no}: {message}", file=path, fix=fix)


def _split_header(content: str) -> tuple[str, str]:
    """Label and value of one header record (the text before the closing ``|``)."""
    flat = " ".join(content.split()).lower()
    for label in sorted(HEADER_KEYS, key=len, reverse=True):
        if flat.startswith(label + " ") or flat == label:
            # value = what follows the label's words in the original text
            words = len(label.split())
            parts = content.split(None, words)
            return label, (parts[words].strip() if len(parts) > words else "")
    return content[1:24].strip().lower(), content[24:].strip()


def read_iaga2002(path) -> IagaRecord:
    """Read one IAGA-2002 file.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    IagaRecord

    Raises
    ------
    potfield.errors.InputDataError
        When the file is missing or empty, or a header or data record does not follow the
        format; the message names the file and the line number and says what was expected.

    Notes
    -----
    Header labels are matched ignoring case and repeated spaces, any number of header records is
    accepted, and the data block is parsed in one vectorised pass. The format is the IAGA-2002
    Data Exchange Format (IAGA Working Group V-DAT; published by INTERMAGNET and NOAA-NCEI).
    """
    path = Path(path)
    if not path.is_file():
        raise InputDataError("file not found", file=path, fix="check the file name")
    text = path.read_text(encoding="ascii", errors="replace")
    lines = text.splitlines()
    if not any(line.strip() for line in lines):
        raise InputDataError("file is empty", file=path, fix="check that the right file is named")

    header: dict = {}
    comments: list[str] = []
    data_header = None
    for index, raw in enumerate(lines):
        line_no = index + 1
        line = raw.rstrip()
        if not line:
            continue
        if line.lstrip().upper().startswith("DATE"):
            data_header = index
            break
        if not line.endswith("|"):
            _fail(
                path,
                line_no,
                "a header or comment record must end with '|' (column 70)",
                "follow the IAGA-2002 layout: label from column 2, value from column 25, '|' in column 70",
            )
        content = line[:-1]
        stripped = content.strip()
        if stripped.startswith("#"):
            comments.append(stripped[1:].strip())
            continue
        if not stripped:
            _fail(path, line_no, "empty header record", "remove the line or give a label and a value")
        label, value = _split_header(content)
        if not label:
            _fail(
                path,
                line_no,
                "header record has no label in columns 2-24",
                "put the label (e.g. 'IAGA CODE') from column 2 and the value from column 25",
            )
        key = HEADER_KEYS.get(label, "_".join(label.split()))
        header[key] = value
    if data_header is None:
        raise InputDataError(
            "no data header record ('DATE       TIME         DOY ...') found after the header",
            file=path,
            fix="add the data header line before the data records",
        )
    for key in _NUMERIC_KEYS:
        if key in header:
            value = header[key]
            try:
                header[key] = float(value) if value.strip() else float("nan")
                if np.isinf(header[key]) or value.strip().lower() in ("nan", "+nan", "-nan"):
                    raise ValueError(value)
            except ValueError:
                label_no = _header_line(lines, data_header, HEADER_LABELS[key])
                _fail(
                    path,
                    label_no,
                    f"{HEADER_LABELS[key]} '{value}' is not a number",
                    "write it as a finite decimal number (degrees, or metres for Elevation)",
                )

    # --- data header --------------------------------------------------------------------------
    tokens = lines[data_header].replace("|", " ").split()
    if [t.upper() for t in tokens[:3]] != ["DATE", "TIME", "DOY"] or len(tokens) != 7:
        _fail(
            path,
            data_header + 1,
            f"data header has {max(len(tokens) - 3, 0)} column labels after 'DATE TIME DOY'",
            "give exactly four labels (IAGA code + element, e.g. 'BOUX BOUY BOUZ BOUF') ending in '|'",
        )
    labels = [t.upper() for t in tokens[3:]]
    code = str(header.get("iaga_code", "")).strip().upper()
    elements = ""
    for label in labels:
        own_code = bool(code) and label.startswith(code) and len(label) > len(code)
        element = label[len(code) :] if own_code else label[-1]
        if len(element) != 1 or element not in ELEMENTS:
            _fail(
                path,
                data_header + 1,
                f"column label '{label}' does not end in a known element letter",
                "use the IAGA code followed by one of X Y Z H D I F S G E",
            )
        elements += element
    if len(set(elements)) != 4:
        _fail(
            path, data_header + 1, f"column labels repeat an element ({elements})", "give each element once"
        )
    if not code:
        code = labels[0][:-1]
        header["iaga_code"] = code
    warnings: list[str] = []
    reported = str(header.get("reported", "")).strip().upper()
    if not reported:
        header["reported"] = elements
    elif reported.rstrip() != elements and reported[: len(elements)] != elements:
        warnings.append(
            f"{path.name}: Reported '{reported}' differs from the data columns "
            f"'{elements}'; the data columns are used"
        )

    # --- data records (one vectorised pass) ---------------------------------------------------
    body = lines[data_header + 1 :]
    body = np.array(body, dtype=str) if body else np.zeros(0, dtype=str)
    keep = np.char.str_len(np.char.strip(body)) > 0
    line_numbers = np.nonzero(keep)[0] + data_header + 2
    if line_numbers.size == 0:
        raise InputDataError(
            "no data records after the data header", file=path, fix="check that the right file is named"
        )
    block = "\n".join(body[keep])
    names = ["date", "clock", "doy", "v0", "v1", "v2", "v3"]
    try:
        frame = pd.read_csv(
            io.StringIO(block), sep=r"\s+", header=None, names=names, dtype=str, engine="c", na_filter=False
        )
    except pd.errors.ParserError as err:
        found = re.search(r"line (\d+)", str(err))
        line_no = int(line_numbers[int(found.group(1)) - 1]) if found else int(line_numbers[0])
        _fail(
            path,
            line_no,
            "data record has more than date, time, day of year and four values",
            "write 'YYYY-MM-DD hh:mm:ss.sss DDD' and exactly four values",
        )
    short = (frame.isna() | (frame == "")).any(axis=1).to_numpy()
    if short.any():
        _fail(
            path,
            int(line_numbers[np.argmax(short)]),
            "data record has fewer than date, time, day of year and four values",
            "write 'YYYY-MM-DD hh:mm:ss.sss DDD' and exactly four values (99999.00 = missing)",
        )
    times = pd.to_datetime(frame["date"] + "T" + frame["clock"], format="ISO8601", errors="coerce").to_numpy(
        dtype="datetime64[ns]"
    )
    bad = np.isnat(times)
    if bad.any():
        i = int(np.argmax(bad))
        _fail(
            path,
            int(line_numbers[i]),
            f"cannot read date and time '{frame['date'].iloc[i]} {frame['clock'].iloc[i]}'",
            "write them as YYYY-MM-DD hh:mm:ss.sss",
        )
    doy = pd.to_numeric(frame["doy"], errors="coerce").to_numpy(dtype=float)
    expected = pd.DatetimeIndex(times).day_of_year.to_numpy()
    bad = ~(doy == expected)
    if bad.any():
        i = int(np.argmax(bad))
        _fail(
            path,
            int(line_numbers[i]),
            f"day of year '{frame['doy'].iloc[i]}' does not match "
            f"the date {frame['date'].iloc[i]} (expected {expected[i]:03d})",
            "correct the DOY column (3 digits, 001-366)",
        )
    data = pd.DataFrame({"time": times})
    for j, element in enumerate(elements):
        values = pd.to_numeric(frame[f"v{j}"], errors="coerce").to_numpy(dtype=float, copy=True)
        bad = ~np.isfinite(values)
        if bad.any():
            i = int(np.argmax(bad))
            _fail(
                path,
                int(line_numbers[i]),
                f"value '{frame[f'v{j}'].iloc[i]}' of {labels[j]} is not a finite number",
                "write numbers as %10.2f, 99999.00 for missing",
            )
        values[values >= SENTINEL_MIN] = np.nan
        data[element] = values
    _derive(data)
    return IagaRecord(
        header=header,
        comments=comments,
        data=data,
        elements=elements,
        rows=line_numbers.astype(np.int64),
        path=path,
        warnings=warnings,
    )


def _header_line(lines, stop, label) -> int:
    for i in range(stop):
        if " ".join(lines[i].split()).lower().startswith(label.lower()):
            return i + 1
    return 1


def _derive(data: pd.DataFrame) -> None:
    """Add ``declination_deg``, ``inclination_deg`` and the canonical components in place.

    X = H cos D, Y = H sin D; from D, I, F: H = F cos I, Z = F sin I (Chapman and Bartels 1940,
    Geomagnetism, Oxford, ch. 1); total field from F or S, else sqrt(X^2 + Y^2 + Z^2) - G.
    """
    cols = set(data.columns)
    n = len(data)
    nan = np.full(n, np.nan)
    if "D" in cols:
        data["declination_deg"] = data["D"] / 60.0
    if "I" in cols:
        data["inclination_deg"] = data["I"] / 60.0
    scalar = data["F"].to_numpy() if "F" in cols else data["S"].to_numpy() if "S" in cols else None
    h = data["H"].to_numpy() if "H" in cols else None
    z = data["Z"].to_numpy() if "Z" in cols else None
    if h is None and "I" in cols and scalar is not None:
        inc = np.radians(data["inclination_deg"].to_numpy())
        h = scalar * np.cos(inc)
        if z is None:
            z = scalar * np.sin(inc)
    if "X" in cols and "Y" in cols:
        north, east = data["X"].to_numpy(), data["Y"].to_numpy()
    elif h is not None and "D" in cols:
        dec = np.radians(data["declination_deg"].to_numpy())
        north, east = h * np.cos(dec), h * np.sin(dec)
    elif h is not None and "E" in cols:
        # E: east component in a frame whose north is along the baseline declination; without
        # that baseline, X and Y cannot be recovered exactly.
        north, east = nan.copy(), nan.copy()
    else:
        north = data["X"].to_numpy() if "X" in cols else nan.copy()
        east = data["Y"].to_numpy() if "Y" in cols else nan.copy()
    down = z if z is not None else nan.copy()
    if scalar is not None:
        total = scalar
    elif "G" in cols:
        total = np.sqrt(north**2 + east**2 + down**2) - data["G"].to_numpy()
    else:
        total = nan.copy()
    data["mag_north"] = np.asarray(north, dtype=float)
    data["mag_east"] = np.asarray(east, dtype=float)
    data["mag_down"] = np.asarray(down, dtype=float)
    data["total_field"] = np.asarray(total, dtype=float)


def looks_like_iaga2002(path) -> bool:
    """True when the first non-blank line is an IAGA-2002 'Format' header record."""
    try:
        with open(path, encoding="ascii", errors="replace") as handle:
            for line in handle:
                if line.strip():
                    flat = " ".join(line.replace("|", " ").split()).lower()
                    return flat.startswith("format iaga-2002") or flat.startswith("format iaga2002")
    except OSError:
        return False
    return False


# --- writer -------------------------------------------------------------------------------------


def _record(text: str) -> str:
    text = text[: RECORD_LENGTH - 1]
    return text.ljust(RECORD_LENGTH - 1) + "|"


def _element_values(frame: pd.DataFrame, element: str) -> np.ndarray:
    """Values of one element from the frame: its own column, else derived from canonical ones."""
    if element in frame.columns:
        return frame[element].to_numpy(dtype=float)
    get = lambda name: frame[name].to_numpy(dtype=float) if name in frame.columns else None  # noqa: E731
    north, east, down, total = get("mag_north"), get("mag_east"), get("mag_down"), get("total_field")
    derived = None
    if element == "X":
        derived = north
    elif element == "Y":
        derived = east
    elif element == "Z":
        derived = down
    elif element in "FS":
        derived = total
    elif element == "H" and north is not None and east is not None:
        derived = np.hypot(north, east)
    elif element == "D":
        if "declination_deg" in frame.columns:
            derived = frame["declination_deg"].to_numpy(dtype=float) * 60.0
        elif north is not None and east is not None:
            derived = np.degrees(np.arctan2(east, north)) * 60.0
    elif element == "I":
        if "inclination_deg" in frame.columns:
            derived = frame["inclination_deg"].to_numpy(dtype=float) * 60.0
        elif north is not None and east is not None and down is not None:
            derived = np.degrees(np.arctan2(down, np.hypot(north, east))) * 60.0
    elif element == "G" and all(a is not None for a in (north, east, down, total)):
        derived = np.sqrt(north**2 + east**2 + down**2) - total
    if derived is None:
        raise InputDataError(
            f"cannot write element '{element}': the table has neither a column "
            f"'{element}' nor the components it is derived from",
            fix="add the column or choose other reported elements",
        )
    return derived


def write_iaga2002(path, record_or_frame, header: dict | None = None, comments=None) -> Path:
    """Write an IAGA-2002 file (atomic).

    Parameters
    ----------
    path : str or Path
    record_or_frame : IagaRecord or pandas.DataFrame
        A record read by :func:`read_iaga2002`, or a frame with ``time`` and either the element
        columns (letters; D and I in minutes of arc) or the canonical ``mag_north``,
        ``mag_east``, ``mag_down``, ``total_field`` (and ``declination_deg``).
    header : dict, optional
        Canonical keys (see :data:`HEADER_LABELS`); required with a frame, overrides a record's
        header. ``iaga_code`` and ``reported`` (four element letters) are needed.
    comments : list of str, optional
        Comment records (without ``#``); default the record's comments.

    Returns
    -------
    Path

    Notes
    -----
    Every header, comment and data-header record is exactly 70 characters ending in ``|``; data
    records are ``YYYY-MM-DD hh:mm:ss.sss DDD`` then four ``%10.2f`` values with 99999.00 for
    missing, as in the IAGA-2002 Data Exchange Format description. Longitudes are written 0-360.
    """
    if isinstance(record_or_frame, IagaRecord):
        frame = record_or_frame.data
        merged = dict(record_or_frame.header)
        merged.setdefault("reported", record_or_frame.elements)
        if header:
            merged.update(header)
        if comments is None:
            comments = record_or_frame.comments
        elements_default = record_or_frame.elements
    else:
        frame = record_or_frame
        merged = dict(header or {})
        elements_default = None
    code = str(merged.get("iaga_code", "")).strip().upper()
    if not code:
        raise InputDataError(
            "no IAGA code given for the IAGA-2002 header",
            key="iaga_code",
            fix="pass header={'iaga_code': 'ABC', ...}",
        )
    elements = (elements_default or str(merged.get("reported", "")).strip().upper())[:4]
    if len(elements) != 4 or any(e not in ELEMENTS for e in elements):
        raise InputDataError(
            f"reported elements '{elements}' are not four element letters",
            key="reported",
            fix="use e.g. 'XYZF', 'HDZF', 'XYZG' or 'DHZF'",
        )
    merged.setdefault("format", "IAGA-2002")
    merged.setdefault("reported", elements)
    lines = []
    for key, label in HEADER_LABELS.items():
        if key == "publication_date" and key not in merged:
            continue
        value = merged.get(key, "")
        if key == "longitude" and value != "" and np.isfinite(float(value)):
            value = f"{float(value) % 360.0:.3f}"
        elif key == "latitude" and value != "" and np.isfinite(float(value)):
            value = f"{float(value):.3f}"
        elif key == "elevation" and value != "" and np.isfinite(float(value)):
            value = f"{float(value):g}"
        elif isinstance(value, float) and not np.isfinite(value):
            value = ""
        lines.append(_record(f" {label:<23}{value}"))
    for comment in comments or []:
        lines.append(_record(f" # {comment}"))
    heading = "DATE       TIME         DOY   " + "".join(f"  {code + e:<8}" for e in elements)
    lines.append(_record(heading))

    times = pd.DatetimeIndex(pd.to_datetime(frame["time"])).round("ms")
    stamp = pd.Series(times.strftime("%Y-%m-%d %H:%M:%S.%f").str.slice(0, 23))
    doy = pd.Series(np.char.mod("%03d", times.day_of_year.to_numpy()))
    body = stamp + " " + doy + "   "
    for element in elements:
        values = np.asarray(_element_values(frame, element), dtype=float)
        values = np.where(np.isfinite(values), values, MISSING)
        if np.any(np.abs(values) >= 1e7):
            raise InputDataError(
                f"element {element} has values too large for %10.2f",
                fix="check the units (nT, minutes of arc)",
            )
        body = body + pd.Series(np.char.mod("%10.2f", values))
    text = "\n".join(lines) + "\n" + ("\n".join(body.tolist()) + "\n" if len(body) else "")
    return write_text(path, text)


# --- observatory readings table -----------------------------------------------------------------


def observatory_table(paths, geoid_undulation: float = 0.0) -> pd.DataFrame:
    """Stack IAGA-2002 station files into the readings-table form of an observatory survey.

    Parameters
    ----------
    paths : iterable of str or Path
        One or more IAGA-2002 files (several stations, several days each).
    geoid_undulation : float
        Geoid height N (m) added to the files' elevations (above mean sea level) to give
        ``height``; 0 treats the elevation as an ellipsoidal height.

    Returns
    -------
    pandas.DataFrame
        ``line`` (= ``station``, the IAGA code), ``station``, ``time``, ``longitude``
        (-180..180), ``latitude``, ``height``, ``elevation``, ``mag_north``, ``mag_east``,
        ``mag_down``, ``total_field`` (nT), ``source_file`` (file name), ``source_row`` (line in
        the file); sorted by line (station) then time.
    """
    frames = []
    for path in paths:
        record = read_iaga2002(path)
        lat = record.header.get("latitude", np.nan)
        lon = record.header.get("longitude", np.nan)
        if not (np.isfinite(lat) and np.isfinite(lon)):
            raise InputDataError(
                "Geodetic Latitude/Longitude missing from the header",
                file=path,
                fix="add both header records (degrees)",
            )
        if not -90.0 <= lat <= 90.0:
            raise InputDataError(
                f"Geodetic Latitude {lat} is outside -90..90", file=path, fix="correct the header record"
            )
        if not -180.0 <= lon <= 360.0:
            raise InputDataError(
                f"Geodetic Longitude {lon} is outside -180..360",
                file=path,
                fix="correct the header record (degrees east)",
            )
        elevation = record.header.get("elevation", np.nan)
        elevation = 0.0 if not np.isfinite(elevation) else float(elevation)
        data = record.data
        n = len(data)
        frames.append(
            pd.DataFrame(
                {
                    "line": record.code,
                    "station": record.code,
                    "time": data["time"].to_numpy(),
                    "longitude": np.full(n, ((float(lon) + 180.0) % 360.0) - 180.0),
                    "latitude": np.full(n, float(lat)),
                    "height": np.full(n, elevation + geoid_undulation),
                    "elevation": np.full(n, elevation),
                    "mag_north": data["mag_north"].to_numpy(),
                    "mag_east": data["mag_east"].to_numpy(),
                    "mag_down": data["mag_down"].to_numpy(),
                    "total_field": data["total_field"].to_numpy(),
                    "source_file": Path(path).name,
                    "source_row": record.rows,
                }
            )
        )
    if not frames:
        raise InputDataError("no IAGA-2002 files given", fix="list the station files in [input] files")
    table = pd.concat(frames, ignore_index=True)
    table = table.sort_values(["line", "time"], kind="mergesort").reset_index(drop=True)
    return table
