"""Gravity reference fields: speed, memory and accuracy.

* normal gravity (closed form) on 1e5-1e6 points, accuracy against boule;
* Longman tide on 1e5-1e6 readings, accuracy against tidegravity (G rescaled);
* terrain correction on a synthetic DEM (30 m cells, 40 km square) at 10-400 stations: time per
  station, and accuracy of the zone pyramid against an all-fine computation and of the
  curvature-corrected flat terrain against the Bouguer cap.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pandas as pd
from _common import peak_rss_mb, timed


def bench_normal_gravity(sizes=(100_000, 1_000_000)):
    import boule

    from potfield.fields.gravity.reductions import bouguer_cap, normal_gravity

    rows = []
    rng = np.random.default_rng(0)
    for n in sizes:
        lat, h = rng.uniform(-90, 90, n), rng.uniform(0, 5000, n)
        tracemalloc.start()
        ours, seconds = timed(normal_gravity, lat, h, "WGS84")
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        ref = boule.WGS84.normal_gravity((None, lat, h))
        _, cap_seconds = timed(bouguer_cap, h)
        rows.append(
            {
                "points": n,
                "seconds": round(seconds, 4),
                "bouguer_cap_seconds": round(cap_seconds, 4),
                "peak_traced_mb": round(peak / 2**20, 1),
                "max_abs_diff_vs_boule_mgal": float(np.max(np.abs(ours - ref))),
            }
        )
    return {
        "rows": rows,
        "peak_rss_mb": round(peak_rss_mb(), 1),
        "summary": f"{rows[-1]['points']} points in {rows[-1]['seconds']} s, "
        f"{rows[-1]['max_abs_diff_vs_boule_mgal']:.1e} mGal vs boule",
    }


def bench_tides(sizes=(100_000, 1_000_000)):
    import tidegravity

    from potfield.fields.gravity.tides import longman_gravity

    rows = []
    for n in sizes:
        times = pd.date_range("2024-01-01", periods=n, freq="10s")
        lon, lat, h = np.full(n, 10.0), np.full(n, 45.0), np.full(n, 100.0)
        tracemalloc.start()
        ours, seconds = timed(longman_gravity, lon, lat, h, times.values, 1.1575)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        k = min(n, 20_000)  # tidegravity loops in Python over datetimes: compare a subset
        _, _, g0 = tidegravity.solve_longman_tide(
            lat[:k], lon[:k], h[:k], np.array(times[:k].to_pydatetime())
        )
        diff = np.max(np.abs(ours[:k] + np.asarray(g0) * 6.6743 / 6.673))
        rows.append(
            {
                "readings": n,
                "seconds": round(seconds, 4),
                "peak_traced_mb": round(peak / 2**20, 1),
                "max_abs_diff_vs_tidegravity_mgal": float(diff),
            }
        )
    return {
        "rows": rows,
        "peak_rss_mb": round(peak_rss_mb(), 1),
        "summary": f"{rows[-1]['readings']} readings in {rows[-1]['seconds']} s, "
        f"{rows[-1]['max_abs_diff_vs_tidegravity_mgal']:.1e} mGal vs tidegravity",
    }


def _synthetic_dem(spacing, half_width):
    from potfield.io.grids import make_grid

    e = np.arange(-half_width, half_width, spacing) + spacing / 2
    east, north = np.meshgrid(e, e)
    z = (
        400.0
        + 250.0 * np.sin(east / 3100.0) * np.cos(north / 2300.0)
        + 60.0 * np.sin(east / 410.0 + north / 530.0)
    )
    return make_grid(e, e, z, name="elevation", units="m", long_name="synthetic DEM")


def bench_terrain(station_counts=(10, 100, 400)):
    from potfield.fields.gravity.reductions import bouguer_cap
    from potfield.fields.gravity.terrain import terrain_correction
    from potfield.io.grids import make_grid

    dem = _synthetic_dem(30.0, 20_000.0)
    rng = np.random.default_rng(1)
    # compile outside the timings
    terrain_correction([0.0], [0.0], [400.0], dem, radius=1000.0, inner_radius=500.0)
    rows = []
    for n in station_counts:
        x, y = rng.uniform(-3000, 3000, n), rng.uniform(-3000, 3000, n)
        h = np.asarray(dem.interp(easting=xr_points(x), northing=xr_points(y)).values)
        tracemalloc.start()
        result, seconds = timed(terrain_correction, x, y, h, dem, radius=15_000.0, inner_radius=2_000.0)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        rows.append(
            {
                "stations": n,
                "dem_cells": int(dem.size),
                "radius_m": 15_000.0,
                "zones_m": [s for s, _ in result.zone_spacings],
                "seconds": round(seconds, 3),
                "ms_per_station": round(1000 * seconds / n, 2),
                "peak_traced_mb": round(peak / 2**20, 1),
                "mean_correction_mgal": float(np.mean(result.correction)),
            }
        )
    # the standard 166.7 km radius on a 90 m DEM (14 million cells), 100 stations
    big = _synthetic_dem(90.0, 170_000.0)
    x, y = rng.uniform(-3000, 3000, 100), rng.uniform(-3000, 3000, 100)
    h = np.asarray(big.interp(easting=xr_points(x), northing=xr_points(y)).values)
    full, full_seconds = timed(terrain_correction, x, y, h, big, radius=166_700.0, inner_radius=2_000.0)
    rows.append(
        {
            "stations": 100,
            "dem_cells": int(big.size),
            "radius_m": 166_700.0,
            "zones_m": [s for s, _ in full.zone_spacings],
            "seconds": round(full_seconds, 3),
            "ms_per_station": round(10 * full_seconds, 2),
            "mean_correction_mgal": float(np.mean(full.correction)),
        }
    )
    del big
    # accuracy of the zone pyramid: all-fine (inner radius = radius) on 10 stations
    x, y = rng.uniform(-2000, 2000, 10), rng.uniform(-2000, 2000, 10)
    h = np.asarray(dem.interp(easting=xr_points(x), northing=xr_points(y)).values)
    zoned = terrain_correction(x, y, h, dem, radius=8_000.0, inner_radius=2_000.0).correction
    fine, fine_seconds = timed(terrain_correction, x, y, h, dem, radius=8_000.0, inner_radius=8_000.0)
    zone_error = float(np.max(np.abs(zoned - fine.correction)))
    # curvature: flat terrain, a point 1500 m above it, to 166.7 km, against the cap
    e = np.arange(-170_000.0, 170_000.0, 500.0) + 250.0
    flat = make_grid(e, e, np.zeros((e.size, e.size)), name="elevation", units="m", long_name="flat")
    cap, cap_seconds = timed(
        terrain_correction, [0.0], [0.0], [1500.0], flat, radius=166_735.0, ground=np.nan
    )
    cap_error = float(abs(cap.correction[0] - bouguer_cap(1500.0)))
    return {
        "rows": rows,
        "zone_pyramid_max_abs_error_mgal": zone_error,
        "zone_pyramid_mean_correction_mgal": float(np.mean(fine.correction)),
        "all_fine_seconds_10_stations": round(fine_seconds, 3),
        "cap_1500m_abs_error_mgal": cap_error,
        "cap_seconds": round(cap_seconds, 3),
        "peak_rss_mb": round(peak_rss_mb(), 1),
        "summary": f"{rows[-2]['ms_per_station']} ms/station (30 m DEM, 15 km radius), "
        f"{rows[-1]['ms_per_station']} ms/station (90 m DEM, 166.7 km); zones "
        f"{zone_error:.3f} mGal off all-fine; cap {cap_error:.3f} mGal off",
    }


def xr_points(values):
    import xarray as xr

    return xr.DataArray(np.asarray(values), dims="points")
