"""Magnetic and observatory part of the reference stage: the IGRF-14 main field.

Glue only: the synthesis is :func:`potfield.fields.magnetic.igrf.igrf`. Called by
:mod:`potfield.stages.reference` (which defines the stage) for magnetic and observatory surveys.

Magnetic surveys, columns added (nT):

``igrf``
    IGRF-14 total intensity at each reading's longitude, latitude, height and time, or at the
    fixed date ``reference.igrf_date`` when it is set.
``anomaly``
    total-field anomaly ``total_field - diurnal - igrf`` (``total_field - igrf`` when there is
    no ``diurnal`` column), the scalar difference of observed and model intensities.
``flag_reference_missing``
    true where position or time is missing (``igrf`` and ``anomaly`` are NaN there).

Observatory surveys (station minute values), columns added (nT):

``igrf_north``, ``igrf_east``, ``igrf_down``, ``igrf``
    IGRF-14 X, Y, Z and F at the station and time.
``disturbance_north``, ``disturbance_east``, ``disturbance_down``
    observed minus IGRF (when the table has ``mag_north``, ``mag_east``, ``mag_down``).
``disturbance_total``
    ``total_field - igrf`` (when the table has ``total_field``).
``flag_reference_missing``
    as above.

The stage records the field direction at the survey centroid (``inclination``,
``declination``, ``total_intensity``) for the reduction to the pole.

References
----------
IAGA Working Group V-MOD (2024). International Geomagnetic Reference Field, 14th generation
(IGRF-14), doi:10.5281/zenodo.14012302. Alken, P., et al. (2021). International Geomagnetic
Reference Field: the thirteenth generation. Earth, Planets and Space, 73, 49.
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic Applications, CUP, sec. 12.1
(total-field anomaly as a scalar difference).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import ConfigError, InputDataError, ModelRangeError, StageError
from ..fields.errors import FieldError, OutOfModelRange
from ..fields.magnetic.igrf import FIRST_YEAR, LAST_YEAR, MODEL_NAME, decimal_year, igrf
from ._boundary import translate
from .base import StageContext, StageOutput, usable

#: Columns this module creates, by survey kind.
MAGNETIC_COLUMNS = ("igrf", "anomaly", "flag_reference_missing")
OBSERVATORY_COLUMNS = (
    "igrf_north",
    "igrf_east",
    "igrf_down",
    "igrf",
    "disturbance_north",
    "disturbance_east",
    "disturbance_down",
    "disturbance_total",
    "flag_reference_missing",
)
#: Decimal year after which IGRF-14 is a forecast (secular variation only).
DEFINITIVE_UNTIL = 2025.0

_POSITION = ("longitude", "latitude", "height", "time")


def _require(table: pd.DataFrame, columns, kind: str) -> None:
    for name in columns:
        if name not in table.columns:
            fix = f"map the input column to '{name}' under [input.columns] in survey.toml"
            if name == "time":
                fix += ", or set igrf_date under [reference]"
            raise StageError(
                f"the readings table has no '{name}' column, needed for the IGRF at each {kind}",
                key=f"input.columns.{name}",
                fix=fix,
            )


def _where(table: pd.DataFrame, index: int) -> dict:
    """file= and row= of one table row, for messages."""
    where = {}
    if "source_file" in table.columns:
        where["file"] = table["source_file"].iloc[index]
    if "source_row" in table.columns:
        where["row"] = table["source_row"].iloc[index]
    return where


def _fixed_year(ctx: StageContext) -> float:
    text = ctx.config.reference.igrf_date
    config_file = getattr(ctx.survey, "config_path", "survey.toml")
    try:
        stamp = pd.Timestamp(str(text).strip())
    except (ValueError, TypeError):
        stamp = None
    if stamp is None or pd.isna(stamp):
        raise ConfigError(
            f"cannot read igrf_date '{text}' as a date",
            file=config_file,
            key="reference.igrf_date",
            fix='write it as "YYYY-MM-DD" or remove it',
        )
    if stamp.tzinfo is not None:
        stamp = stamp.tz_convert("UTC").tz_localize(None)
    year = float(decimal_year(np.datetime64(stamp.to_datetime64(), "ns")))
    if not FIRST_YEAR <= year <= LAST_YEAR:
        raise ModelRangeError(
            f"igrf_date {text} is outside the {MODEL_NAME} range {FIRST_YEAR:.0f}-01-01 .. "
            f"{LAST_YEAR:.0f}-01-01",
            file=config_file,
            key="reference.igrf_date",
            fix="give a date in that range or remove igrf_date to use each reading's time",
        )
    return year


def _model_years(ctx: StageContext, table: pd.DataFrame) -> tuple[np.ndarray, str]:
    """Decimal year of the model at each row, and the mode ("per-reading" or "fixed")."""
    if ctx.config.reference.igrf_date:
        return np.full(len(table), _fixed_year(ctx)), "fixed"
    years = decimal_year(table["time"].to_numpy())
    bad = np.flatnonzero(np.isfinite(years) & ((years < FIRST_YEAR) | (years > LAST_YEAR)))
    if bad.size:
        first = bad[0]
        raise ModelRangeError(
            f"{bad.size} reading(s) are dated outside the {MODEL_NAME} range "
            f"{FIRST_YEAR:.0f}-01-01 .. {LAST_YEAR:.0f}-01-01 (first: "
            f"{pd.Timestamp(table['time'].iloc[first])})",
            **_where(table, first),
            fix="check the time column and [input.time] format, or set reference.igrf_date",
        )
    return years, "per-reading"


def _check_latitudes(table: pd.DataFrame) -> None:
    lat = table["latitude"].to_numpy(dtype=float)
    bad = np.flatnonzero(np.abs(lat) > 90.0)
    if bad.size:
        raise InputDataError(
            f"latitude {lat[bad[0]]:g} is outside [-90, 90] degrees ({bad.size} reading(s))",
            **_where(table, bad[0]),
            fix="check the latitude column and [survey] crs in survey.toml",
        )


def _centroid(ctx: StageContext, table: pd.DataFrame, years: np.ndarray, ok: np.ndarray):
    """Longitude, latitude, height and decimal year of the survey centroid.

    Longitude and latitude: the ingest stage's centroid when recorded, else the (circular) mean
    of the readings; height: median; time: median of the model dates.
    """
    centroid = ctx.state.get("ingest", {}).get("centroid")
    lon = table["longitude"].to_numpy(dtype=float)[ok]
    lat = table["latitude"].to_numpy(dtype=float)[ok]
    if centroid is not None and len(centroid) == 2 and np.all(np.isfinite(centroid)):
        lon_c, lat_c = float(centroid[0]), float(centroid[1])
    else:
        rad = np.radians(lon)
        lon_c = float(np.degrees(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())))
        lat_c = float(lat.mean())
    height_c = float(np.median(table["height"].to_numpy(dtype=float)[ok]))
    year_c = float(np.median(years[ok]))
    return lon_c, lat_c, height_c, year_c


def _year_to_iso(year: float) -> str:
    whole = int(np.floor(year))
    start = np.datetime64(f"{whole:04d}-01-01", "ns")
    length = np.datetime64(f"{whole + 1:04d}-01-01", "ns") - start
    stamp = start + (length * (year - whole)).astype("timedelta64[ns]")
    return str(pd.Timestamp(stamp).floor("s")).replace(" ", "T")


def _stats(prefix: str, values: np.ndarray) -> dict:
    values = values[np.isfinite(values)]
    if values.size == 0:
        return {}
    return {
        f"{prefix}_min": float(values.min()),
        f"{prefix}_max": float(values.max()),
        f"{prefix}_mean": float(values.mean()),
        f"{prefix}_std": float(values.std()),
    }


@translate(
    {OutOfModelRange: ModelRangeError, FieldError: InputDataError},
    fix="check the position and time columns of the input files",
)
def run_magnetic(ctx: StageContext) -> StageOutput:
    """Remove the IGRF-14 main field (magnetic and observatory surveys).

    Evaluates :func:`potfield.fields.magnetic.igrf.igrf` (IAGA Working Group V-MOD 2024, IGRF-14) at
    every reading, per reading's time or at ``reference.igrf_date``, and adds the model and
    the residual columns described in the module docstring.

    Parameters
    ----------
    ctx : StageContext
        ``ctx.table`` with ``longitude``, ``latitude``, ``height``, ``time`` and, for magnetic
        surveys, ``total_field`` (``diurnal`` when the diurnal stage ran); for observatory
        surveys ``mag_north``, ``mag_east``, ``mag_down`` and/or ``total_field``.

    Returns
    -------
    StageOutput
        The table with the new columns; state ``inclination``, ``declination``,
        ``total_intensity`` at the centroid and ``igrf_date_mode``; metrics of the model and
        of the residuals.
    """
    table = ctx.table
    if table is None:
        raise StageError("no readings table", fix="run the ingest stage first")
    kind = ctx.config.kind
    needed = _POSITION if not ctx.config.reference.igrf_date else _POSITION[:3]
    _require(table, needed, "station" if kind == "observatory" else "reading")
    if kind == "magnetic":
        _require(table, ("total_field",), "reading")
    elif not ({"mag_north", "mag_east", "mag_down"} <= set(table.columns) or "total_field" in table):
        raise StageError(
            "the observatory table has neither mag_north/mag_east/mag_down nor total_field",
            key="input.columns",
            fix="map the X, Y, Z (or F) columns of the station files",
        )
    _check_latitudes(table)
    years, mode = _model_years(ctx, table)

    ctx.progress(f"IGRF-14 at {len(table)} readings ({mode} date)")
    field = igrf(
        table["longitude"].to_numpy(dtype=float),
        table["latitude"].to_numpy(dtype=float),
        table["height"].to_numpy(dtype=float),
        years,
    )
    missing = ~np.isfinite(field.total)
    out = StageOutput(table=table.copy(deep=False))
    new = out.table
    new["igrf"] = field.total
    notes, warnings = out.notes, out.warnings

    if kind == "observatory":
        new["igrf_north"], new["igrf_east"], new["igrf_down"] = field.north, field.east, field.down
        if {"mag_north", "mag_east", "mag_down"} <= set(table.columns):
            for comp in ("north", "east", "down"):
                new[f"disturbance_{comp}"] = table[f"mag_{comp}"].to_numpy(dtype=float) - getattr(field, comp)
        if "total_field" in table.columns:
            new["disturbance_total"] = table["total_field"].to_numpy(dtype=float) - field.total
    else:
        observed = table["total_field"].to_numpy(dtype=float)
        if "diurnal" in table.columns:
            observed = observed - table["diurnal"].to_numpy(dtype=float)
            notes.append("anomaly = total_field - diurnal - igrf")
        else:
            warnings.append(
                "no diurnal column (diurnal stage off or not run): "
                "anomaly = total_field - igrf, with the external field left in"
            )
        new["anomaly"] = observed - field.total
    new["flag_reference_missing"] = missing

    ok = ~missing
    if not ok.any():
        raise InputDataError(
            "no reading has a finite longitude, latitude, height and time for the IGRF",
            fix="check the position and time columns of the input files",
        )
    if missing.any():
        warnings.append(
            f"{int(missing.sum())} reading(s) lack position or time: flagged in flag_reference_missing"
        )

    lon_c, lat_c, h_c, year_c = _centroid(ctx, table, years, ok)
    centre = igrf(lon_c, lat_c, h_c, year_c)
    fixed = ctx.config.reference.igrf_date if mode == "fixed" else None
    out.state = {
        "model": MODEL_NAME,
        "igrf_date_mode": mode,
        "igrf_date": fixed,
        "inclination": float(centre.inclination),
        "declination": float(centre.declination),
        "total_intensity": float(centre.total),
        "horizontal_intensity": float(centre.horizontal),
        "north": float(centre.north),
        "east": float(centre.east),
        "down": float(centre.down),
        "centroid": [lon_c, lat_c],
        "centroid_height": h_c,
        "centroid_decimal_year": year_c,
        "centroid_time": _year_to_iso(year_c),
    }
    notes.append(
        f"{MODEL_NAME} at the centroid ({lon_c:.4f}, {lat_c:.4f}, {h_c:.0f} m, "
        f"{out.state['centroid_time'][:10]}): F {centre.total:.1f} nT, "
        f"I {centre.inclination:.3f} deg, D {centre.declination:.3f} deg"
    )
    if np.nanmax(years) > DEFINITIVE_UNTIL:
        warnings.append(
            f"{MODEL_NAME} after {DEFINITIVE_UNTIL:.0f}.0 is a forecast from the "
            "secular variation; re-process when the next IGRF is published"
        )

    good = ok & usable(table)
    out.metrics = {
        "igrf_date_mode": mode,
        "readings_without_reference": int(missing.sum()),
        **{k: v for k, v in _stats("igrf", field.total[ok]).items() if not k.endswith("_std")},
    }
    if kind == "observatory":
        for comp in ("north", "east", "down", "total"):
            column = f"disturbance_{comp}"
            if column in new.columns:
                values = new[column].to_numpy(dtype=float)[good]
                values = values[np.isfinite(values)]
                if values.size:
                    out.metrics[f"{column}_rms"] = float(np.sqrt(np.mean(values**2)))
                    out.metrics[f"{column}_mean"] = float(values.mean())
        out.tables["reference_stations"] = _station_table(new, years, ok)
        out.state["stations"] = {
            str(row.station): {
                "longitude": float(row.longitude),
                "latitude": float(row.latitude),
                "height": float(row.height),
                "inclination": float(row.igrf_inclination),
                "declination": float(row.igrf_declination),
                "total_intensity": float(row.igrf),
            }
            for row in out.tables["reference_stations"].itertuples()
        }
    else:
        out.metrics.update(_stats("anomaly", new["anomaly"].to_numpy(dtype=float)[good]))
    return out


def _station_table(table: pd.DataFrame, years: np.ndarray, ok: np.ndarray) -> pd.DataFrame:
    """One row per station: position, IGRF at the station's median time, mean disturbances."""
    station = table["station"] if "station" in table.columns else table.get("line")
    if station is None:
        station = pd.Series("all", index=table.index)
    frame = pd.DataFrame(
        {
            "station": station.astype(str).to_numpy()[ok],
            "longitude": table["longitude"].to_numpy(dtype=float)[ok],
            "latitude": table["latitude"].to_numpy(dtype=float)[ok],
            "height": table["height"].to_numpy(dtype=float)[ok],
            "year": years[ok],
        }
    )
    for comp in ("north", "east", "down", "total"):
        if f"disturbance_{comp}" in table.columns:
            frame[f"mean_disturbance_{comp}"] = table[f"disturbance_{comp}"].to_numpy(dtype=float)[ok]
    grouped = frame.groupby("station", sort=True)
    summary = grouped.median()
    summary["readings"] = grouped.size()
    for column in [c for c in frame.columns if c.startswith("mean_disturbance_")]:
        summary[column] = grouped[column].mean()
    centre = igrf(
        summary["longitude"].to_numpy(),
        summary["latitude"].to_numpy(),
        summary["height"].to_numpy(),
        summary["year"].to_numpy(),
    )
    summary["time"] = [_year_to_iso(y) for y in summary["year"]]  # loop over stations
    summary["igrf_north"], summary["igrf_east"], summary["igrf_down"] = centre.north, centre.east, centre.down
    summary["igrf"] = centre.total
    summary["igrf_inclination"] = centre.inclination
    summary["igrf_declination"] = centre.declination
    summary = summary.drop(columns="year").reset_index()
    return summary[
        [
            "station",
            "longitude",
            "latitude",
            "height",
            "time",
            "readings",
            "igrf_north",
            "igrf_east",
            "igrf_down",
            "igrf",
            "igrf_inclination",
            "igrf_declination",
            *[c for c in summary.columns if c.startswith("mean_disturbance_")],
        ]
    ]
