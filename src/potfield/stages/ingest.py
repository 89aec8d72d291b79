"""ingest stage: raw files -> the canonical readings table.

Reads every file of ``[input] files`` (delimited text; IAGA-2002 for observatory surveys), maps
columns to canonical names, parses times, converts units, projects coordinates both ways with
pyproj (longitude/latitude and easting/northing in the output CRS), tells lines apart and marks
tie lines, sorts by line and time and adds the distance along each line.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj

from ..config import SurveyConfig, unit_factor
from ..errors import ConfigError, CRSError, InputDataError, format_rows
from ..io.delimited import KEEP_PREFIX, TEXT_COLUMNS, convert_units, parse_time, read_delimited, to_numeric
from ..io.tables import dictionary_encode
from .base import Check, Contract, Stage, StageContext, StageOutput

NUMERIC_COLUMNS = (
    "longitude",
    "latitude",
    "easting",
    "northing",
    "height",
    "total_field",
    "mag_north",
    "mag_east",
    "mag_down",
    "reading",
    "instrument_height",
    "elevation",
    "reading_sd",
    "meter_tide",
)


def parse_crs(text: str, key: str) -> pyproj.CRS:
    """A pyproj CRS from an EPSG code or PROJ string; an unknown one is a one-line error."""
    try:
        return pyproj.CRS.from_user_input(text)
    except pyproj.exceptions.CRSError:
        raise CRSError(
            f"unknown coordinate reference system '{text}'",
            key=key,
            fix='use an EPSG code such as "EPSG:4326" or "EPSG:32755", or a PROJ string',
        ) from None


def output_crs(config: SurveyConfig, lon: np.ndarray, lat: np.ndarray, input_crs: pyproj.CRS) -> pyproj.CRS:
    """The output CRS: as configured, ``"input"`` = the input CRS, ``"auto"`` = the UTM zone
    (WGS 84) of the survey centroid (pyproj's UTM database query), whatever the input CRS."""
    if config.survey.output_crs == "input":
        _require_metric(input_crs, config.survey.crs, "survey.crs")
        return input_crs
    if config.survey.output_crs != "auto":
        crs = parse_crs(config.survey.output_crs, "survey.output_crs")
        _require_metric(crs, config.survey.output_crs, "survey.output_crs")
        return crs
    lon0, lat0 = float(np.nanmean(lon)), float(np.nanmean(lat))
    from pyproj.aoi import AreaOfInterest
    from pyproj.database import query_utm_crs_info

    infos = query_utm_crs_info(datum_name="WGS 84", area_of_interest=AreaOfInterest(lon0, lat0, lon0, lat0))
    zone = 32600 + int((lon0 + 180) // 6) % 60 + 1 if lat0 >= 0 else 32700 + int((lon0 + 180) // 6) % 60 + 1
    code = f"EPSG:{zone}"
    for info in infos:  # prefer the database's answer (it knows Norway/Svalbard exceptions)
        if info.code.startswith(("326", "327")):
            code = f"EPSG:{info.code}"
            break
    return pyproj.CRS.from_user_input(code)


def _require_metric(crs: pyproj.CRS, text: str, key: str) -> None:
    """Gridding, distances and derivatives need a projected CRS in metres."""
    if not crs.is_projected:
        raise CRSError(
            f"output CRS '{text}' is {'geographic' if crs.is_geographic else 'not projected'}"
            " (degrees); processing needs a projected CRS in metres",
            key=key,
            fix='set survey.output_crs = "auto" (UTM zone) or a projected EPSG code such as "EPSG:32755"',
        )
    units = {(axis.unit_name or "").lower() for axis in crs.axis_info[:2]}
    if not units <= {"metre", "meter", "m"}:
        raise CRSError(
            f"CRS '{text}' has axes in {', '.join(sorted(units))}, not metres",
            key=key,
            fix='set survey.output_crs = "auto" (UTM zone) or a projected CRS in metres',
        )


#: Measured-value columns per survey kind: at least one must be mapped (and hold values).
KIND_VALUES = {
    "magnetic": ("total_field", "mag_north", "mag_east", "mag_down"),
    "gravity": ("reading",),
    "observatory": ("mag_north", "mag_east", "mag_down", "total_field"),
}
#: Fewest readings the stages can work with (fourth differences need five consecutive ones).
MIN_READINGS = 5


def check_value_columns(config: SurveyConfig) -> None:
    """The survey kind's measured value must be mapped; another kind's value says so."""
    wanted = KIND_VALUES[config.kind]
    mapped = config.input.columns
    if any(name in mapped for name in wanted):
        return
    others = [
        name for kind, names in KIND_VALUES.items() if kind != config.kind for name in names if name in mapped
    ]
    hint = f"; '{others[0]}' is a value of another survey kind (check survey.kind)" if others else ""
    raise ConfigError(
        f"a {config.kind} survey needs its measured value: no input column is mapped to "
        f"{' or '.join(wanted)}{hint}",
        key=f"input.columns.{wanted[0]}",
        fix=f'add {wanted[0]} = "<your column>" under [input.columns], or correct survey.kind',
    )


def check_readings(table: pd.DataFrame, config: SurveyConfig) -> None:
    """Enough readings, some measured values, and named lines (each a one-line error)."""
    n = len(table)
    if n < MIN_READINGS:
        raise InputDataError(
            f"too few readings to process: {n}; need at least {MIN_READINGS}",
            file=table["source_file"].iat[0] if n else None,
            fix="check that the right files are named in input.files and that their rows are complete",
        )
    values = [name for name in KIND_VALUES[config.kind] if name in table]
    if values and not any(np.isfinite(table[name].to_numpy(dtype=float)).any() for name in values):
        raise InputDataError(
            f"every {' and '.join(values)} value is missing ({n:,} readings)",
            key=f"input.columns.{values[0]}",
            fix="check the column mapping and input.missing_values",
        )
    if "line" in table:
        text = table["line"]
        blank = (text.isna() | (text.astype("string").str.strip() == "")).to_numpy(dtype=bool)
        if blank.any():
            first = int(np.argmax(blank))
            raise InputDataError(
                f"line name is blank at line {format_rows(table['source_row'].to_numpy()[blank])}",
                file=table["source_file"].iat[first],
                key="input.columns.line",
                fix="fill in the line names, or remove the line mapping to split lines by time gaps",
            )


def _tie_mask(lines: pd.Series, config: SurveyConfig) -> np.ndarray:
    spec = config.lines
    mask = np.zeros(len(lines), dtype=bool)
    if spec.tie_lines:
        mask |= lines.isin([str(t) for t in spec.tie_lines]).to_numpy()
    if spec.tie_pattern:
        try:
            pattern = re.compile(spec.tie_pattern)
        except re.error as err:
            raise InputDataError(
                f"tie_pattern is not a valid regular expression ({err})",
                key="lines.tie_pattern",
                fix="correct the pattern",
            ) from None
        mask |= lines.str.contains(pattern).fillna(False).to_numpy(dtype=bool)
    if spec.tie_min is not None:
        numbers = pd.to_numeric(lines, errors="coerce").to_numpy(dtype=float)
        mask |= np.nan_to_num(numbers, nan=-np.inf) >= spec.tie_min
    return mask


def input_format(config: SurveyConfig, path: Path) -> str:
    """``"aseg-gdf2"`` or ``"delimited"`` for one input file (``[input] format``; ``"auto"`` =
    ASEG-GDF2 for a ``.dat`` file with its ``.des`` beside it)."""
    if config.input.format != "auto":
        return config.input.format
    from ..io.gdf2 import descriptor_path

    if path.suffix.lower() == ".dat" and descriptor_path(path) is not None:
        return "aseg-gdf2"
    return "delimited"


def _stripped_text(column: pd.Series) -> np.ndarray:
    """A text column as an object array of stripped strings (missing: ``pd.NA``).

    Each distinct value is stripped once and its string shared by its readings (a line column
    of 1e7 readings holds a few hundred names), instead of one new string per reading.
    """
    codes, uniques = pd.factorize(column, use_na_sentinel=True)
    names = pd.Series(uniques, dtype="string").str.strip().astype(object).to_numpy()
    out = names[codes] if len(names) else np.full(len(codes), pd.NA, dtype=object)
    out[codes < 0] = pd.NA
    return out


def read_readings(config: SurveyConfig, files: list[Path]) -> pd.DataFrame:
    """Read, map, parse and convert every input file; concatenated in file order.

    ``[input] keep_columns`` are carried unchanged (as text) under ``raw_<name>``.
    """
    columns = dict(config.input.columns)
    check_value_columns(config)
    keep = {f"{KEEP_PREFIX}{name}": name for name in config.input.keep_columns}
    # an ASEG-GDF2 descriptor matched by a glob beside its .dat is not a data file
    data = {(p.parent, p.stem.lower()) for p in files if p.suffix.lower() == ".dat"}
    files = [p for p in files if not (p.suffix.lower() == ".des" and (p.parent, p.stem.lower()) in data)]
    frames = []
    warnings: list[str] = []
    for path in files:
        units = dict(config.input.units)
        if input_format(config, path) == "aseg-gdf2":
            from ..io.gdf2 import read_gdf2

            frame, declared = read_gdf2(
                path, columns={**columns, **keep}, missing_values=config.input.missing_values, units=units
            )
            units = {**declared, **units}
        else:
            frame = read_delimited(
                path,
                columns={**columns, **keep},
                delimiter=config.input.delimiter,
                skip_rows=config.input.skip_rows,
                missing_values=config.input.missing_values,
                encoding=config.input.encoding,
                comment=config.input.comment,
                decimal=config.input.decimal,
            )
        warnings += frame.attrs.get("warnings", [])
        if "time" in columns:
            out = pd.DataFrame({"time": parse_time(frame, config.input.time, path, names=columns)})
        else:  # a survey without time (station lists): no time column, no diurnal correction
            out = pd.DataFrame(index=pd.RangeIndex(len(frame)))
        for name in columns:
            if name in ("time", "date"):
                continue
            if name in TEXT_COLUMNS:
                out[name] = _stripped_text(frame[name])
            else:
                out[name] = convert_units(to_numeric(frame, name, path), unit_factor(name, units))
        for name in keep:
            out[name] = frame[name].astype(object).to_numpy()
        out["source_file"] = frame["source_file"].to_numpy()
        out["source_row"] = frame["source_row"].to_numpy()
        frames.append(out)
    table = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    table.attrs["warnings"] = warnings
    return table


def read_observatory(config: SurveyConfig, files: list[Path]) -> pd.DataFrame:
    """Observatory station files: IAGA-2002 as they are, delimited text through the column
    mapping with each file's station and position from ``[[input.stations]]``."""
    import fnmatch

    from ..io.iaga2002 import looks_like_iaga2002, observatory_table

    iaga = [p for p in files if config.input.format == "auto" and looks_like_iaga2002(p)]
    frames = [observatory_table(iaga, geoid_undulation=config.survey.geoid_undulation)] if iaga else []
    for path in (p for p in files if p not in iaga):
        spec = next(
            (
                s
                for s in config.input.stations
                if fnmatch.fnmatch(path.name, Path(s.file).name)
                or fnmatch.fnmatch(str(path), str(Path(s.file)))
                or str(path).endswith(s.file)
            ),
            None,
        )
        if spec is None:
            raise InputDataError(
                "not an IAGA-2002 file and no [[input.stations]] entry names it",
                file=path,
                key="input.stations",
                fix="add [[input.stations]] with file, station, longitude, latitude "
                "(and map time, mag_north, mag_east, mag_down, total_field)",
            )
        table = read_readings(config, [path])
        n = len(table)
        for name in ("mag_north", "mag_east", "mag_down", "total_field"):
            if name not in table:
                table[name] = np.full(n, np.nan)
        table["line"] = spec.station
        table["station"] = spec.station
        table["longitude"] = np.full(n, ((spec.longitude + 180.0) % 360.0) - 180.0)
        table["latitude"] = np.full(n, float(spec.latitude))
        table["elevation"] = np.full(n, float(spec.elevation))
        table["height"] = np.full(n, float(spec.elevation) + config.survey.geoid_undulation)
        frames.append(table)
    if not frames:
        raise InputDataError(
            "no station files given", key="input.files", fix="list the station files in [input] files"
        )
    table = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    return table.sort_values(["line", "time"], kind="mergesort").reset_index(drop=True)


def _check_range(table: pd.DataFrame, name: str, low: float, high: float, fix: str) -> None:
    values = table[name].to_numpy()
    bad = (values < low) | (values > high)
    if bad.any():
        first = int(np.argmax(bad))
        rows = table["source_row"].to_numpy()[bad]
        raise InputDataError(
            f"{name} {values[first]:g} outside {low:g}..{high:g} at line {format_rows(rows)}",
            file=table["source_file"].iat[first],
            fix=fix,
        )


def _check_missing(table: pd.DataFrame, names) -> None:
    """Coordinates are needed for every reading: a blank one is an error naming its lines."""
    for name in names:
        bad = ~np.isfinite(table[name].to_numpy(dtype=float))
        if bad.any():
            first = int(np.argmax(bad))
            raise InputDataError(
                f"{name} is missing at line {format_rows(table['source_row'].to_numpy()[bad])}",
                file=table["source_file"].iat[first],
                key=f"input.columns.{name}",
                fix="fill in the coordinates or remove those rows",
            )


def georeference(table: pd.DataFrame, config: SurveyConfig) -> tuple[pd.DataFrame, pyproj.CRS]:
    """Fill longitude/latitude and easting/northing both ways with pyproj."""
    in_crs = parse_crs(config.survey.crs, "survey.crs")
    if in_crs.is_geographic:
        for name in ("longitude", "latitude"):
            if name not in table:
                raise InputDataError(
                    f"input CRS {config.survey.crs} is geographic but no column is mapped to {name}",
                    key=f"input.columns.{name}",
                    fix=f"map {name} under [input.columns], or set survey.crs to the projected CRS of easting/northing",
                )
        _check_range(
            table,
            "latitude",
            -90,
            90,
            "check the latitude column and that longitude/latitude are not swapped",
        )
        _check_range(table, "longitude", -180, 360, "check the longitude column (degrees, -180..360)")
        _check_missing(table, ("longitude", "latitude"))
        lon, lat = table["longitude"].to_numpy(), table["latitude"].to_numpy()
        if in_crs.to_epsg() != 4326:
            to_wgs = pyproj.Transformer.from_crs(in_crs, "EPSG:4326", always_xy=True)
            lon, lat = to_wgs.transform(lon, lat)
        out_crs = output_crs(config, lon, lat, in_crs)
        fwd = pyproj.Transformer.from_crs("EPSG:4326", out_crs, always_xy=True)
        easting, northing = fwd.transform(lon, lat)
    else:
        for name in ("easting", "northing"):
            if name not in table:
                raise InputDataError(
                    f"input CRS {config.survey.crs} is projected but no column is mapped to {name}",
                    key=f"input.columns.{name}",
                    fix=f"map {name} under [input.columns]",
                )
        _check_missing(table, ("easting", "northing"))
        inv = pyproj.Transformer.from_crs(in_crs, "EPSG:4326", always_xy=True)
        lon, lat = inv.transform(table["easting"].to_numpy(), table["northing"].to_numpy())
        out_crs = output_crs(config, lon, lat, in_crs)
        if out_crs == in_crs:
            easting, northing = table["easting"].to_numpy(), table["northing"].to_numpy()
        else:
            fwd = pyproj.Transformer.from_crs("EPSG:4326", out_crs, always_xy=True)
            easting, northing = fwd.transform(lon, lat)
    table["longitude"] = np.asarray(lon, dtype=float)
    table["latitude"] = np.asarray(lat, dtype=float)
    table["easting"] = np.asarray(easting, dtype=float)
    table["northing"] = np.asarray(northing, dtype=float)
    bad = ~np.isfinite(table["easting"].to_numpy()) & np.isfinite(table["longitude"].to_numpy())
    if bad.any():
        raise CRSError(
            f"coordinates cannot be projected to {out_crs.name} at line "
            f"{format_rows(table['source_row'].to_numpy()[bad])}",
            file=table["source_file"].iat[int(np.argmax(bad))],
            key="survey.output_crs",
            fix="check the coordinates and the CRS",
        )
    return table, out_crs


def assign_lines(table: pd.DataFrame, config: SurveyConfig) -> pd.DataFrame:
    """Give every reading a line name and a line type (traverse/tie)."""
    if "line" not in table:
        if (
            "time" not in table
            and "loop" not in table
            and not (config.kind == "observatory" and "station" in table)
        ):
            # no time to split lines by: one line per input file
            table["line"] = pd.factorize(table["source_file"])[0].astype(str)
            table["line"] = np.char.add("L", (table["line"].astype(int) + 1).astype(str)).astype(object)
        elif config.kind == "observatory" and "station" in table:
            table["line"] = table["station"]
        elif "loop" in table:
            table["line"] = table["loop"].astype(str)
        elif config.kind == "gravity":
            # One line per local solar day (UTC + mean longitude / 15 h): a field day is not cut
            # at UTC midnight far from Greenwich.
            shift = (
                np.timedelta64(int(np.nanmean(table["longitude"]) / 15.0 * 3600), "s")
                if "longitude" in table
                else np.timedelta64(0, "s")
            )
            local = pd.Series(table["time"].to_numpy() + shift)
            table["line"] = local.dt.strftime("%Y-%m-%d").to_numpy()
        else:
            # A new line at every time gap longer than split_gap_s (within each file).
            t = table["time"].to_numpy().astype("datetime64[ns]").astype(np.int64) / 1e9
            new = np.ones(len(table), dtype=bool)
            new[1:] = (np.diff(t) > config.lines.split_gap_s) | (
                table["source_file"].to_numpy()[1:] != table["source_file"].to_numpy()[:-1]
            )
            table["line"] = np.char.add("L", np.cumsum(new).astype(str)).astype(object)
    table["line"] = table["line"].astype(str)
    if "line_type" in table:
        text = table["line_type"].astype(str).str.strip().str.lower()
        table["line_type"] = np.where(text.isin(["tie", "t", "tl"]), "tie", "traverse")
    else:
        table["line_type"] = np.where(_tie_mask(table["line"], config), "tie", "traverse")
    return table


def along_line_distance(easting, northing, groups) -> np.ndarray:
    """Cumulative distance along each line (m), restarting at 0 at every line start."""
    e, n, g = np.asarray(easting), np.asarray(northing), np.asarray(groups)
    step = np.zeros(e.size)
    if e.size > 1:
        step[1:] = np.hypot(np.diff(e), np.diff(n))
        step[1:][g[1:] != g[:-1]] = 0.0
    step = np.nan_to_num(step)
    total = np.cumsum(step)
    starts = np.r_[True, g[1:] != g[:-1]] if g.size else np.zeros(0, bool)
    offset = np.maximum.accumulate(np.where(starts, total, 0.0))
    return total - offset


def line_geometry(table: pd.DataFrame) -> dict:
    """Nominal line direction and spacing of traverse and tie lines.

    The direction is the median heading of the traverse lines (end-to-end vectors, folded to
    0-180 deg); the spacing is the median gap between sorted perpendicular offsets of the line
    centroids (common practice).
    """
    result = {
        "line_direction_deg": None,
        "line_spacing_m": None,
        "tie_spacing_m": None,
        "line_spacing_max_deviation": None,
    }
    if len(table) < 2:
        return result
    grouped = table.groupby("line", sort=False)
    ends = grouped.agg(
        e0=("easting", "first"),
        n0=("northing", "first"),
        e1=("easting", "last"),
        n1=("northing", "last"),
        ec=("easting", "mean"),
        nc=("northing", "mean"),
        kind=("line_type", "first"),
        count=("easting", "size"),
    )
    length = np.hypot(ends.e1 - ends.e0, ends.n1 - ends.n0)
    trav = ends[(ends.kind == "traverse") & (length > 0)]
    if len(trav) >= 2:
        azimuth = np.degrees(np.arctan2(trav.e1 - trav.e0, trav.n1 - trav.n0)) % 180.0
        # circular median of doubled angles
        ang = np.radians(2 * azimuth)
        direction = (np.degrees(np.arctan2(np.median(np.sin(ang)), np.median(np.cos(ang)))) / 2) % 180
        result["line_direction_deg"] = float(direction)
        ux, uy = np.sin(np.radians(direction)), np.cos(np.radians(direction))
        for kind, key in (("traverse", "line_spacing_m"), ("tie", "tie_spacing_m")):
            sel = ends[(ends.kind == kind) & (length > 0)]
            if len(sel) >= 2:
                if kind == "traverse":
                    offset = sel.ec * uy - sel.nc * ux  # perpendicular to the line direction
                else:
                    offset = sel.ec * ux + sel.nc * uy  # ties run across: along the traverse direction
                gaps = np.diff(np.sort(offset.to_numpy()))
                gaps = gaps[gaps > 1.0]
                if gaps.size:
                    result[key] = float(np.median(gaps))
                    if kind == "traverse":
                        result["line_spacing_max_deviation"] = float(
                            np.max(np.abs(gaps - result[key])) / result[key]
                        )
    if result["line_spacing_m"] is None:
        # Station surveys: median nearest-neighbour distance between distinct positions.
        from ..fields._numerics import median_spacing

        pts = np.unique(np.round(table[["easting", "northing"]].to_numpy(), 1), axis=0)
        if len(pts) >= 2:
            result["line_spacing_m"] = median_spacing(pts[:, 0], pts[:, 1])
    return result


def _sort(table: pd.DataFrame) -> pd.DataFrame:
    within = table["time"].to_numpy() if "time" in table else np.arange(len(table))
    order = np.lexsort((within, pd.factorize(table["line"], sort=True)[0]))
    return table.iloc[order].reset_index(drop=True)


def run(ctx: StageContext) -> StageOutput:
    config = ctx.config
    files = ctx.survey.input_files(config)
    ctx.progress(f"reading {len(files)} file(s)")
    if config.kind == "observatory":
        table = read_observatory(config, files)
        warnings = list(table.attrs.pop("warnings", []))
        in_crs = parse_crs(config.survey.crs, "survey.crs")
        _check_range(table, "latitude", -90, 90, "check the station's Geodetic Latitude header")
        check_readings(table, config)
        table, out_crs = georeference(table, config) if in_crs.is_geographic else (table, in_crs)
    else:
        table = read_readings(config, files)
        warnings = list(table.attrs.pop("warnings", []))
        check_readings(table, config)
        if config.survey.height_reference == "geoid" and "height" in table:
            table["height"] = table["height"] + config.survey.geoid_undulation
        table, out_crs = georeference(table, config)
    table = assign_lines(table, config)
    table = _sort(table)
    table["distance"] = along_line_distance(
        table["easting"], table["northing"], pd.factorize(table["line"])[0]
    )
    ordered = [
        c
        for c in (
            "time",
            "longitude",
            "latitude",
            "height",
            "easting",
            "northing",
            "line",
            "line_type",
            "distance",
        )
        if c in table
    ]
    ordered += [c for c in table.columns if c not in ordered and c not in ("source_file", "source_row")]
    table = table[ordered + ["source_file", "source_row"]]
    geometry = line_geometry(table)
    t = table["time"] if "time" in table else None
    state = {
        "crs": out_crs.to_wkt(),
        "crs_name": out_crs.name,
        "crs_code": ":".join(out_crs.to_authority()) if out_crs.to_authority() else None,
        "centroid": [float(table["longitude"].mean()), float(table["latitude"].mean())],
        "region": [
            float(table["easting"].min()),
            float(table["easting"].max()),
            float(table["northing"].min()),
            float(table["northing"].max()),
        ],
        "time_span": [str(t.min()), str(t.max())] if t is not None else [None, None],
        **geometry,
    }
    lines = table.groupby("line_type")["line"].nunique().to_dict()
    metrics = {
        "files": len(files),
        "readings": len(table),
        "traverse_lines": int(lines.get("traverse", 0)),
        "tie_lines": int(lines.get("tie", 0)),
        "time_start": state["time_span"][0],
        "time_end": state["time_span"][1],
        "crs": state["crs_name"],
        "line_spacing_m": geometry["line_spacing_m"],
        "tie_spacing_m": geometry["tie_spacing_m"],
    }
    checks = []
    if geometry.get("line_spacing_max_deviation") is not None:
        tol, source = ctx.tolerance("line_spacing_tolerance_fraction", 0.25)
        checks.append(
            Check.at_most(
                "line spacing: largest deviation of adjacent traverse lines from nominal (fraction)",
                geometry["line_spacing_max_deviation"],
                tol,
                "",
                source,
                detail=f"nominal {geometry['line_spacing_m']:.0f} m from line centroids",
            )
        )
    notes = [
        f"{len(table):,} readings from {len(files)} file(s) on {table['line'].nunique()} line(s); "
        f"output CRS {out_crs.name}"
    ]
    return StageOutput(
        table=dictionary_encode(table),
        metrics=metrics,
        state=state,
        notes=notes,
        checks=checks,
        warnings=warnings,
    )


def _inputs(config, survey):
    return survey.input_files(config)


STAGE = Stage(
    name="ingest",
    summary="read the raw files, map columns, parse times, convert units, project coordinates, "
    "tell lines apart, sort by line and time",
    run=run,
    sections=("lines",),
    inputs=_inputs,
    # ingest makes the table: besides these, every column mapped in [input.columns] is its own
    contract=Contract(
        provides_columns=(
            "longitude",
            "latitude",
            "easting",
            "northing",
            "line",
            "line_type",
            "distance",
            "source_file",
            "source_row",
        ),
        optional_columns=("*",),
        reads=(),  # it reads the raw files, no earlier table
    ),
)
