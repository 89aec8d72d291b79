"""Gravity part of the reference stage: normal gravity, atmospheric, free-air, Bouguer and terrain.

Glue only: the physics is in :mod:`potfield.fields.gravity.reductions` and :mod:`potfield.fields.gravity.terrain`.
Called by :mod:`potfield.stages.reference` (which defines the stage) for gravity surveys.

Columns added (mGal unless stated):

``normal_gravity``
    gamma at the reading's latitude and ellipsoidal height (closed form, Li and Goetze 2001).
``atmospheric``
    atmospheric correction (Hinze et al. 2005); 0 when ``reference.atmospheric = false``.
``disturbance``
    gravity disturbance g - gamma(h) at the point (no height reduction needed).
``free_air_anomaly``
    g - gamma(0) + free-air correction (+ atmospheric when enabled).
``bouguer``
    Bouguer correction: infinite slab 2 pi G rho h or spherical cap to 166.735 km.
``terrain``
    terrain correction from the DEM (positive, added); NaN without a DEM.
``bouguer_anomaly``
    free_air_anomaly - bouguer + terrain (complete) or free_air_anomaly - bouguer (simple).
``flag_reference_missing``
    true where gravity, latitude or height is missing (the anomalies are NaN there).

References
----------
Hinze, W. J., et al. (2005). New standards for reducing gravity data: The North American
gravity database. Geophysics, 70(4), J25-J32. Li, X. and Goetze, H.-J. (2001). Geophysics 66(6),
1660-1668. LaFehr, T. R. (1991). Geophysics 56(8), 1179-1184.
"""

from __future__ import annotations

import numpy as np

from ..errors import ConfigError, InputDataError, StageError
from ..fields.errors import BadParameter, FieldError
from ..fields.gravity.reductions import (
    atmospheric_correction,
    bouguer_cap,
    bouguer_slab,
    free_air_correction,
    normal_gravity,
)
from ._boundary import Rule, translate
from .base import Check, StageContext, StageOutput, usable

#: Columns this module creates.
COLUMNS = (
    "normal_gravity",
    "atmospheric",
    "disturbance",
    "free_air_anomaly",
    "bouguer",
    "terrain",
    "bouguer_anomaly",
    "flag_reference_missing",
)


def _gravity_column(ctx: StageContext, table, notes):
    if "gravity" in table.columns:
        return "gravity"
    if "reading" in table.columns:
        unit = ctx.config.input.units.get("reading", "mGal")
        if unit == "cu":
            raise StageError(
                "gravity readings are in counter units and no drift stage made a 'gravity' column",
                key="drift.calibration_file",
                fix="give the gravimeter calibration table and run the drift stage first",
            )
        notes.append(
            "no 'gravity' column from the drift stage: the 'reading' column (mGal) is "
            "used as observed gravity, with no tide, drift or base tie applied"
        )
        return "reading"
    raise StageError(
        "the readings table has neither 'gravity' nor 'reading'",
        key="input.columns",
        fix="map the gravimeter reading column to 'reading'",
    )


def _terrain(ctx: StageContext, table, height, notes, warnings, checks, state):
    cfg = ctx.config.reference
    from ..fields.gravity.terrain import terrain_correction
    from ..io.dem import read_dem

    crs = (ctx.state.get("ingest") or {}).get("crs")
    if not crs:
        raise StageError(
            "no survey CRS recorded by the ingest stage",
            key="survey.output_crs",
            fix="run the ingest stage first",
        )
    for column in ("easting", "northing"):
        if column not in table.columns:
            raise StageError(
                f"the readings table has no '{column}' column",
                key="reference.dem_file",
                fix="run the ingest stage, which projects the coordinates",
            )
    path = ctx.survey.resolve(cfg.dem_file)
    ctx.progress(f"reading DEM {path.name}")
    dem = read_dem(path, crs, cfg.dem_crs)
    offset = 0.0
    if cfg.dem_height_reference == "geoid":
        offset = float(ctx.config.survey.geoid_undulation)
        attrs = dict(dem.attrs)
        dem = (dem + offset).assign_attrs(attrs)
    ctx.progress(f"terrain correction at {len(table)} readings")
    result = terrain_correction(
        table["easting"].to_numpy(dtype=float),
        table["northing"].to_numpy(dtype=float),
        height,
        dem,
        density=cfg.density,
        radius=cfg.terrain_radius_m,
        inner_radius=cfg.terrain_inner_radius_m,
        far_ratio=cfg.terrain_far_ratio,
        curvature=cfg.terrain_curvature,
        missing_tolerance=cfg.terrain_missing_tolerance,
        ground=None if cfg.terrain_readings_on_ground else np.full(len(table), np.nan),
    )
    warnings.extend(result.warnings)
    worst = float(np.nanmax(result.missing_fraction)) if result.missing_fraction.size else 0.0
    checks.append(
        Check.at_most(
            "terrain_dem_missing_fraction",
            worst if np.isfinite(worst) else 0.0,
            cfg.terrain_missing_tolerance,
            unit="fraction",
            source="common practice",
            detail=f"largest share of the {cfg.terrain_radius_m / 1000:g} km terrain disc around a "
            "reading not covered by the DEM",
        )
    )
    notes.append(
        f"terrain correction from {path.name} with {len(result.zone_spacings)} zones "
        f"(cells {', '.join(f'{sx:g} m' for sx, _ in result.zone_spacings)}), radius "
        f"{cfg.terrain_radius_m / 1000:g} km, density {cfg.density:g} kg/m^3, "
        f"{'with' if cfg.terrain_curvature else 'without'} Earth curvature"
    )
    if cfg.bouguer == "slab" and cfg.terrain_curvature:
        notes.append(
            "terrain is relative to the spherical shell (curvature on) while the Bouguer "
            "correction is a flat slab: the curvature (Bullard B) term is not applied; "
            'use reference.bouguer = "cap" for a consistent reduction'
        )
    state["terrain"] = {
        "dem_file": str(cfg.dem_file),
        "dem_crs": dem.attrs.get("source_crs"),
        "dem_height_reference": cfg.dem_height_reference,
        "dem_height_offset_m": offset,
        "radius_m": cfg.terrain_radius_m,
        "inner_radius_m": cfg.terrain_inner_radius_m,
        "zone_cell_m": [float(sx) for sx, _ in result.zone_spacings],
        "curvature": cfg.terrain_curvature,
        "max_missing_fraction": worst,
    }
    return result.correction


@translate({BadParameter: Rule(ConfigError, key="reference.ellipsoid"), FieldError: InputDataError})
def run_gravity(ctx: StageContext) -> StageOutput:
    """Add normal gravity, corrections and anomalies to the readings of a gravity survey.

    Parameters
    ----------
    ctx : potfield.stages.base.StageContext

    Returns
    -------
    potfield.stages.base.StageOutput

    References
    ----------
    Hinze, W. J., et al. (2005), Geophysics 70(4), J25-J32.
    """
    if ctx.table is None:
        raise StageError("no readings table", fix="run the ingest stage first")
    cfg = ctx.config.reference
    table = ctx.table.copy(deep=False)  # copy-on-write: new columns only
    notes: list[str] = []
    warnings: list[str] = []
    checks: list[Check] = []
    for column in ("latitude", "height"):
        if column not in table.columns:
            raise StageError(
                f"the readings table has no '{column}' column",
                key="input.columns",
                fix=f"map the input column holding {column} in [input.columns]",
            )
    source = _gravity_column(ctx, table, notes)
    g = table[source].to_numpy(dtype=float)
    lat = table["latitude"].to_numpy(dtype=float)
    h = table["height"].to_numpy(dtype=float)

    gamma_h = normal_gravity(lat, h, cfg.ellipsoid)
    below = int(np.sum(h < 0))
    if below:
        notes.append(
            f"{below} readings lie below the ellipsoid: normal gravity there is the "
            "closed form continued inward (as the free-air gradient does)"
        )
    gamma_0 = normal_gravity(lat, 0.0, cfg.ellipsoid)
    atm = atmospheric_correction(h) if cfg.atmospheric else np.zeros_like(h)
    order = 1 if cfg.free_air_order == "first" else 2
    fac = free_air_correction(h, lat, order=order)
    free_air = g - gamma_0 + fac + atm
    bouguer = bouguer_cap(h, cfg.density) if cfg.bouguer == "cap" else bouguer_slab(h, cfg.density)
    state = {
        "ellipsoid": cfg.ellipsoid,
        "density": cfg.density,
        "bouguer": cfg.bouguer,
        "atmospheric": cfg.atmospheric,
        "free_air_order": cfg.free_air_order,
        "height_type": "ellipsoidal",
        "gravity_source": source,
    }
    if cfg.dem_file:
        terrain = _terrain(ctx, table, h, notes, warnings, checks, state)
        anomaly = free_air - bouguer + terrain
        state["bouguer_anomaly"] = "complete"
    else:
        terrain = np.full(len(table), np.nan)
        anomaly = free_air - bouguer
        state["bouguer_anomaly"] = "simple"
        notes.append("no reference.dem_file: no terrain correction, the Bouguer anomaly is the simple one")
    notes.append(
        f"anomalies use ellipsoidal heights, the {cfg.ellipsoid} ellipsoid, a "
        f"{cfg.bouguer} Bouguer correction at {cfg.density:g} kg/m^3 "
        f"(Hinze et al. 2005)"
    )

    table["normal_gravity"] = gamma_h
    table["atmospheric"] = atm
    table["disturbance"] = g - gamma_h
    table["free_air_anomaly"] = free_air
    table["bouguer"] = bouguer
    table["terrain"] = terrain
    table["bouguer_anomaly"] = anomaly
    missing = ~(np.isfinite(g) & np.isfinite(lat) & np.isfinite(h))
    table["flag_reference_missing"] = missing
    if missing.any():
        warnings.append(
            f"{int(missing.sum())} readings lack gravity, latitude or height: "
            "flagged (flag_reference_missing), anomalies NaN"
        )
    ok = usable(table) & np.isfinite(anomaly)
    metrics = {"readings": int(len(table)), "readings_used": int(ok.sum())}
    for name, values in (("bouguer_anomaly", anomaly), ("free_air_anomaly", free_air), ("terrain", terrain)):
        v = values[ok & np.isfinite(values)]
        if v.size:
            metrics[f"{name}_min_mgal"] = float(v.min())
            metrics[f"{name}_max_mgal"] = float(v.max())
            metrics[f"{name}_mean_mgal"] = float(v.mean())
    return StageOutput(
        table=table, metrics=metrics, state=state, checks=checks, notes=notes, warnings=warnings
    )
