"""One registry of the columns potfield writes, and the table writer that uses it.

Every table in ``out/tables`` is written by :func:`write_table`:

- times as ISO 8601 UTC with milliseconds, ``2025-03-03T22:28:40.000Z`` (ISO 8601-1:2019, the
  extended format with the ``Z`` designator), the same in every table;
- booleans lower case (``true``/``false``), missing values as empty fields;
- floats rounded to the precision of the quantity (:data:`DECIMALS`: nT to 3 decimals, mGal to 4,
  metres to 2, degrees to 7 (about 1 cm), ...), unknown columns to 10 significant digits.

:func:`write_data_dictionary` writes ``out/tables/columns.csv`` (table, name, unit, meaning,
stage) for every column of every table, from :data:`COLUMNS`. A column missing from the
registry is listed with the meaning "not described yet" (a test keeps the demos complete).
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pandas as pd

from .atomic import atomic_path

#: Decimals kept per unit (instrument precision; common practice). "field" = nT or mGal by kind.
DECIMALS = {
    "nT": 3,
    "mGal": 4,
    "m": 2,
    "degrees": 7,
    "s": 3,
    "h": 4,
    "mGal/h": 4,
    "nT/m": 6,
    "mGal/m": 6,
    "nT/s": 4,
    "cu": 3,
    "1": 6,
    "count": 0,
    "kg/m^3": 1,
    "km": 4,
}

#: Columns measured more finely than their unit's default (instrument heights to the mm).
DECIMALS_BY_NAME = {"height": 3, "instrument_height": 3, "elevation": 3}

#: Time format of every table (ISO 8601 UTC, milliseconds).
TIME_FORMAT = "%Y-%m-%dT%H:%M:%S.%LZ"

# name -> (unit, meaning, stage). Unit "field" means nT (magnetic) or mGal (gravity).
COLUMNS: dict[str, tuple[str, str, str]] = {
    # ingest
    "time": ("UTC", "time of the reading, ISO 8601 UTC", "ingest"),
    "longitude": ("degrees", "longitude east, WGS84", "ingest"),
    "latitude": ("degrees", "latitude north, WGS84", "ingest"),
    "height": ("m", "sensor (or station mark) height above the WGS84 ellipsoid", "ingest"),
    "elevation": ("m", "station elevation from the input file", "ingest"),
    "easting": ("m", "easting in the output CRS", "ingest"),
    "northing": ("m", "northing in the output CRS", "ingest"),
    "line": ("", "line (or station network) name", "ingest"),
    "line_type": ("", "traverse or tie", "ingest"),
    "distance": ("m", "distance along the line from its first reading", "ingest"),
    "station": ("", "station name", "ingest"),
    "loop": ("", "gravity loop name", "ingest"),
    "instrument_height": ("m", "gravimeter sensor height above the station mark", "ingest"),
    "reading": ("cu", "gravimeter reading as recorded (counter units or mGal)", "ingest"),
    "total_field": ("nT", "measured total magnetic field", "ingest"),
    "mag_north": ("nT", "measured northward field component X", "ingest"),
    "mag_east": ("nT", "measured eastward field component Y", "ingest"),
    "mag_down": ("nT", "measured downward field component Z", "ingest"),
    "source_file": ("", "raw file the reading came from", "ingest"),
    "source_row": ("count", "line number in the raw file (header = line 1)", "ingest"),
    # clean
    "fourth_difference": (
        "field",
        "fourth difference T[i-2]-4T[i-1]+6T[i]-4T[i+1]+T[i+2] along the line",
        "clean",
    ),
    # diurnal
    "diurnal": ("nT", "diurnal variation removed (base record minus its datum)", "diurnal"),
    "total_field_diurnal": ("nT", "total field after the diurnal correction", "diurnal"),
    "diurnal_mean": ("nT", "mean diurnal correction on the line", "diurnal"),
    "diurnal_min": ("nT", "smallest diurnal correction on the line", "diurnal"),
    "diurnal_max": ("nT", "largest diurnal correction on the line", "diurnal"),
    "base": ("", "base station name", "diurnal"),
    "total_field_min": ("nT", "smallest base reading in the interval", "diurnal"),
    "total_field_max": ("nT", "largest base reading in the interval", "diurnal"),
    "samples": ("count", "base readings in the interval", "diurnal"),
    "spikes": ("count", "base spikes removed", "diurnal"),
    "missing": ("count", "missing base readings", "diurnal"),
    # drift
    "reading_mgal": ("mGal", "reading converted to mGal with the calibration table", "drift"),
    "instrument_height_correction": ("mGal", "instrument height times the free-air gradient, added", "drift"),
    "tide": ("mGal", "Earth-tide correction (Longman 1959), added", "drift"),
    "drift": ("mGal", "instrument drift, subtracted", "drift"),
    "loop_offset": ("mGal", "loop offset from the network adjustment, subtracted", "drift"),
    "gravity": ("mGal", "observed (absolute) gravity", "drift"),
    "drift_residual": ("mGal", "residual of the reading in the drift / network adjustment", "drift"),
    "offset_mgal": ("mGal", "loop offset", "drift"),
    "offset_sigma_mgal": ("mGal", "standard deviation of the loop offset", "drift"),
    "drift_rate_mgal_per_h": ("mGal/h", "drift rate of the loop", "drift"),
    "drift_rate_sigma_mgal_per_h": ("mGal/h", "standard deviation of the drift rate", "drift"),
    "drift_estimated": ("", "true when the loop's drift was estimated", "drift"),
    "closure_mgal": ("mGal", "loop misclosure at the base before the adjustment", "drift"),
    "residual_closure_mgal": ("mGal", "loop misclosure after the adjustment", "drift"),
    "hours": ("h", "duration", "drift"),
    "occupations": ("count", "readings at the station", "drift"),
    "loops": ("count", "loops that visited the station", "drift"),
    "range_mgal": ("mGal", "range of the repeat readings", "drift"),
    "std_mgal": ("mGal", "standard deviation of the repeat readings", "drift"),
    "sigma_mgal": ("mGal", "standard deviation", "drift"),
    "step_mgal": ("mGal", "tare step", "drift"),
    "estimated": ("", "true when estimated by the adjustment", "drift"),
    # reference
    "normal_gravity": ("mGal", "normal gravity at the station (closed form at height)", "reference"),
    "atmospheric": ("mGal", "atmospheric correction (Hinze et al. 2005), added", "reference"),
    "disturbance": ("mGal", "gravity disturbance: observed minus normal gravity at the station", "reference"),
    "free_air_anomaly": ("mGal", "free-air anomaly", "reference"),
    "bouguer": ("mGal", "Bouguer correction (slab or spherical cap), subtracted", "reference"),
    "terrain": ("mGal", "terrain correction, added", "reference"),
    "bouguer_anomaly": ("mGal", "complete Bouguer anomaly", "reference"),
    "igrf": ("nT", "IGRF-14 total field at the reading", "reference"),
    "igrf_north": ("nT", "IGRF-14 northward component", "reference"),
    "igrf_east": ("nT", "IGRF-14 eastward component", "reference"),
    "igrf_down": ("nT", "IGRF-14 downward component", "reference"),
    "igrf_inclination": ("degrees", "IGRF-14 inclination", "reference"),
    "igrf_declination": ("degrees", "IGRF-14 declination", "reference"),
    "anomaly": ("nT", "total-field anomaly: corrected field minus IGRF", "reference"),
    "disturbance_north": ("nT", "north component minus IGRF", "reference"),
    "disturbance_east": ("nT", "east component minus IGRF", "reference"),
    "disturbance_down": ("nT", "down component minus IGRF", "reference"),
    "disturbance_total": ("nT", "total field minus IGRF", "reference"),
    # level
    "level_correction": ("field", "levelling correction, added", "level"),
    "anomaly_levelled": ("field", "anomaly after levelling", "level"),
    "kind": ("", "crossover kind", "level"),
    "tie": ("", "tie line at the crossover", "level"),
    "time_line": ("UTC", "time on the traverse line at the crossover", "level"),
    "time_tie": ("UTC", "time on the tie line at the crossover", "level"),
    "value_line": ("field", "value on the traverse line at the crossover", "level"),
    "value_tie": ("field", "value on the tie line at the crossover", "level"),
    "difference": ("field", "crossover difference, line minus tie, before levelling", "level"),
    "difference_levelled": ("field", "crossover difference after levelling", "level"),
    "height_line": ("m", "height on the traverse line at the crossover", "level"),
    "height_tie": ("m", "height on the tie line at the crossover", "level"),
    "height_difference": ("m", "height difference at the crossover", "level"),
    "gradient_up": ("field/m", "upward vertical gradient of the levelled field at the crossover", "level"),
    "height_effect": (
        "field",
        "gradient times height difference: the part of the misclosure due to height",
        "level",
    ),
    "difference_height_corrected": (
        "field",
        "crossover difference before levelling, height effect removed",
        "level",
    ),
    "difference_levelled_height_corrected": (
        "field",
        "crossover difference after levelling, height effect removed",
        "level",
    ),
    "index_line": ("count", "reading index on the traverse line", "level"),
    "index_tie": ("count", "reading index on the tie line", "level"),
    "fraction_line": ("1", "position between two readings on the traverse line", "level"),
    "fraction_tie": ("1", "position between two readings on the tie line", "level"),
    "flagged": ("", "true when the crossover was left out", "level"),
    "correction_line": ("field", "correction of the traverse line at the crossover", "level"),
    "correction_tie": ("field", "correction of the tie line at the crossover", "level"),
    "used": ("", "true when the crossover was used in the adjustment", "level"),
    "weight": ("1", "robust weight of the crossover", "level"),
    "type": ("", "traverse or tie", "level"),
    "crossovers": ("count", "crossovers on the line", "level"),
    "correction_mean": ("field", "mean correction of the line", "level"),
    "correction_min": ("field", "smallest correction of the line", "level"),
    "correction_max": ("field", "largest correction of the line", "level"),
    "crossover_rms_before": ("field", "RMS crossover difference before levelling", "level"),
    "crossover_rms_after": ("field", "RMS crossover difference after levelling", "level"),
    "warning": ("", "warning about the line", "level"),
    # grid
    "grid_residual": ("field", "reading minus the gridding model at the reading", "grid"),
    "depth": ("m", "trial source depth", "grid"),
    "damping": ("1", "trial damping (dimensionless)", "grid"),
    "heldout_score": ("1", "coefficient of determination on held-out blocks", "grid"),
    "heldout_score_se": ("1", "standard error of the held-out score", "grid"),
    "rms": ("field", "RMS of the held-out residuals", "grid"),
    "chosen": ("", "true for the depth and damping used", "grid"),
    # separate
    "regional": ("field", "regional field at the reading", "separate"),
    "residual": ("field", "residual field at the reading (value minus regional)", "separate"),
    # tables of several stages
    "readings": ("count", "readings", "clean"),
    "start": ("UTC", "first reading", "clean"),
    "end": ("UTC", "last reading", "clean"),
    # checks.csv
    "check": ("", "spec check", "report"),
    "value": ("", "measured value (unit in the unit column)", "report"),
    "tolerance": ("", "tolerance from the spec profile (unit in the unit column)", "report"),
    "sense": ("", "how value and tolerance compare for a pass", "report"),
    "unit": ("", "unit of value and tolerance", "report"),
    "result": ("", "pass or fail", "report"),
    "source": ("", "where the tolerance comes from", "report"),
    "detail": ("", "details of the check", "report"),
    "stage": ("", "stage that made the check", "report"),
    "name": ("", "name", "report"),
    "table": ("", "table the column belongs to", "report"),
    "meaning": ("", "what the column holds", "report"),
}

#: Patterns for families of columns: (regular expression, unit, meaning template, stage).
PATTERNS: tuple[tuple[str, str, str, str], ...] = (
    (r"^flag_(.+)$", "", "true when the reading is flagged: {0}", "clean"),
    (r"^flagged_(.+)$", "count", "readings flagged: {0}", "clean"),
    (r"^fourth_difference_(max|p95|rms)_?(.*)$", "field", "fourth difference {0} {1}", "clean"),
    (r"^fourth_difference_(.+)$", "nT", "fourth difference of {0}", "clean"),
    (r"^sep_(internal|external|residual)_(.+)$", "nT", "{0} part of the {1} disturbance", "separate"),
    (r"^(mean|rms)_(?:disturbance_)?(.+)$", "nT", "{0} of the {1} residual or disturbance", "separate"),
    (r"^epochs_(.+)$", "count", "epochs used for {0}", "separate"),
    (r"^[gh]\d+$|^[qs]\d+$", "nT", "Gauss coefficient (Schmidt semi-normalised)", "separate"),
    (r"^(.+)_mgal$", "mGal", "{0}", ""),
    (r"^(.+)_m$", "m", "{0}", ""),
    (r"^(.+)_deg$", "degrees", "{0}", ""),
    (r"^(.+)_s$", "s", "{0}", ""),
)

#: Tables whose columns carry the units of the "unit" column (no rounding by name).
_FREE_UNITS = {"value", "tolerance"}


def describe(name: str, kind: str = "magnetic") -> tuple[str, str, str]:
    """(unit, meaning, stage) of a column; unit "field" resolved to nT or mGal by survey kind."""
    field = "mGal" if kind == "gravity" else "nT"
    if name in COLUMNS:
        unit, meaning, stage = COLUMNS[name]
    else:
        for pattern, unit, meaning, stage in PATTERNS:  # noqa: B007  (used after the break)
            match = re.match(pattern, name)
            if match:
                words = [g.replace("_", " ") for g in match.groups() if g is not None]
                meaning = meaning.format(*words, *([""] * 3)).strip()
                break
        else:
            return "", "not described yet", ""
    return unit.replace("field", field) if unit.startswith("field") else unit, meaning, stage


def decimals_for(name: str, kind: str = "magnetic") -> int | None:
    """Decimals kept for a float column, None = 10 significant digits."""
    if name in _FREE_UNITS:
        return None
    if name in DECIMALS_BY_NAME:
        return DECIMALS_BY_NAME[name]
    unit, meaning, _ = describe(name, kind)
    if meaning == "not described yet":
        return None
    return DECIMALS.get(unit)


def _significant_places(values: np.ndarray, digits: int = 10) -> int | None:
    """Decimals that keep ``digits`` significant digits of the largest value (None: none finite
    or all zero, the values are written as they are)."""
    finite = np.abs(values[np.isfinite(values)])
    if finite.size == 0 or not finite.max():
        return None
    return max(0, digits - 1 - int(math.floor(math.log10(float(finite.max())))))


def column_places(name: str, values: np.ndarray, kind: str = "magnetic") -> int | None:
    """Decimals :func:`format_table` keeps for the float column ``name`` holding ``values`` (the
    whole column; None: unrounded)."""
    fixed = decimals_for(str(name), kind)
    return fixed if fixed is not None else _significant_places(np.asarray(values, dtype=float))


def float_places(frame: pd.DataFrame, kind: str = "magnetic") -> dict[str, int | None]:
    """Decimals of every float column of ``frame`` as :func:`format_table` rounds it (None:
    unrounded), from the whole column: the same for any piece of the table."""
    return {
        name: column_places(name, frame[name].to_numpy(dtype=float), kind)
        for name in frame.columns
        if pd.api.types.is_float_dtype(frame[name])
    }


def iso_millis(times: np.ndarray) -> np.ndarray:
    """ISO 8601 UTC text to the millisecond, ``2024-11-18T22:30:00.000Z``, of naive UTC
    datetime64 values (truncated, not rounded, to the millisecond; NaT -> None). numpy's own
    formatting: pandas' strftime took half the time of writing a million-row table."""
    nanoseconds = times.astype("datetime64[ns]").view(np.int64)
    missing = np.isnat(times)
    millis = np.floor_divide(nanoseconds, 1_000_000).astype("datetime64[ms]")
    text = np.char.add(np.datetime_as_string(millis, unit="ms"), "Z").astype(object)
    text[missing] = None
    return text


def format_table(
    frame: pd.DataFrame, kind: str = "magnetic", places: dict[str, int | None] | None = None
) -> pd.DataFrame:
    """A copy ready to write: rounded floats, ISO 8601 UTC millisecond times (text).

    ``places`` (from :func:`float_places` of the whole table) fixes the decimals of the float
    columns, so that pieces of a large table are rounded as the whole table would be.
    """
    places = float_places(frame, kind) if places is None else places
    out = {}
    for name in frame.columns:
        column = frame[name]
        if pd.api.types.is_datetime64_any_dtype(column):
            if getattr(column.dt, "tz", None) is not None:
                column = column.dt.tz_convert("UTC").dt.tz_localize(None)
            out[name] = iso_millis(column.to_numpy(dtype="datetime64[ns]"))
        elif pd.api.types.is_float_dtype(column):
            values = column.to_numpy(dtype=float)
            decimals = places[name]
            rounded = values if decimals is None else np.round(values, decimals)
            out[name] = rounded + 0.0  # no "-0"
        else:
            out[name] = column
    return pd.DataFrame(out, index=frame.index)


def _arrow(formatted: pd.DataFrame):
    """A formatted table as Arrow; object columns of mixed types written as text."""
    import pyarrow as pa

    try:
        return pa.Table.from_pandas(formatted, preserve_index=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # mixed object columns: as text
        mixed = formatted.copy()
        for name in mixed.columns:
            if mixed[name].dtype == object:
                mixed[name] = mixed[name].map(
                    lambda v: (
                        None
                        if v is None or pd.isna(v)
                        else (str(v).lower() if isinstance(v, bool) else str(v))
                    )
                )
        return pa.Table.from_pandas(mixed, preserve_index=False)


def _write_pieces(tmp: Path, pieces, kind: str, places, options, cast: bool = False) -> bool:
    """Write the pieces of one table (pandas) as one CSV, each rounded with ``places`` (those of
    the whole table); False when the pieces' Arrow types differ (object columns typed by their
    content) and ``cast`` is off, so the caller writes the table whole. With ``cast`` a piece is
    cast to the first piece's types (text stays the same text)."""
    import pyarrow.csv as pacsv

    schema, writer = None, None
    try:
        for piece in pieces:
            arrow = _arrow(format_table(piece, kind, places))
            if writer is None:
                schema = arrow.schema
                writer = pacsv.CSVWriter(tmp, schema, write_options=options)
            elif not arrow.schema.equals(schema):
                if not cast:
                    return False
                arrow = arrow.cast(schema)
            writer.write_table(arrow)
        if writer is None:  # no piece at all: nothing to write
            return False
    finally:
        if writer is not None:
            writer.close()
    return True


def write_table(path: Path | str, frame: pd.DataFrame, kind: str = "magnetic", chunk_rows: int = 0) -> Path:
    """Write a table as CSV with pyarrow (fast; booleans lower case), atomically.

    A table longer than ``chunk_rows`` (default :data:`potfield.io.atomic.CHUNK_ROWS`) is
    formatted and written piece by piece, with the decimals of the whole table: the same text,
    without a formatted copy of the whole table in memory.
    """
    import pyarrow.csv as pacsv

    from .atomic import CHUNK_ROWS

    options = pacsv.WriteOptions(quoting_style="needed")
    chunk_rows = chunk_rows or CHUNK_ROWS
    with atomic_path(path) as tmp:
        if len(frame) > chunk_rows:
            pieces = (frame.iloc[start : start + chunk_rows] for start in range(0, len(frame), chunk_rows))
            if _write_pieces(tmp, pieces, kind, float_places(frame, kind), options):
                return Path(path)
        pacsv.write_csv(_arrow(format_table(frame, kind)), tmp, options)
    return Path(path)


def write_table_pieces(path: Path | str, pieces, kind: str, places: dict[str, int | None]) -> Path:
    """Write a table given as pieces (pandas, same columns; e.g. read from parquet a chunk at a
    time) as one CSV, atomically, formatted as :func:`write_table` formats the whole table:
    ``places`` are the decimals of the whole table's float columns (:func:`float_places`, or
    :func:`potfield.io.tables.cache_float_places`), so the text is the same."""
    import pyarrow.csv as pacsv

    options = pacsv.WriteOptions(quoting_style="needed")
    with atomic_path(path) as tmp:
        if not _write_pieces(tmp, pieces, kind, places, options, cast=True):
            raise ValueError(f"{path}: no rows to write")
    return Path(path)


def write_data_dictionary(tables: Path, kind: str = "magnetic") -> Path:
    """``columns.csv``: table, name, unit, meaning, stage of every column of every CSV table."""
    rows = []
    for path in sorted(Path(tables).glob("*.csv")):
        if path.name == "columns.csv":
            continue
        with open(path, encoding="utf-8") as handle:
            header = handle.readline().strip()
        for name in header.split(","):
            name = name.strip().strip('"')
            unit, meaning, stage = describe(name, kind)
            rows.append({"table": path.stem, "name": name, "unit": unit, "meaning": meaning, "stage": stage})
    frame = pd.DataFrame(rows, columns=["table", "name", "unit", "meaning", "stage"])
    return write_table(Path(tables) / "columns.csv", frame, kind)
