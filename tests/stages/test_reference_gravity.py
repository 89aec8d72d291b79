"""reference stage, gravity kind (potfield.stages.reference_gravity), on small tables."""

from __future__ import annotations

import boule
import harmonica
import numpy as np
import pandas as pd
import pytest

from potfield.config import parse_config
from potfield.errors import InputDataError, StageError
from potfield.io.grids import make_grid, write_netcdf
from potfield.stages.base import StageContext
from potfield.stages.reference import run
from potfield.stages.reference_gravity import run_gravity
from potfield.survey import Survey

UTM = "EPSG:32633"
E0, N0 = 500_000.0, 6_600_000.0


def _ctx(tmp_path, table, reference=None, survey=None, units=None):
    config = parse_config(
        {
            "survey": {"kind": "gravity", **(survey or {})},
            "input": {"units": units or {}},
            "reference": reference or {},
        }
    )
    state = {"ingest": {"crs": UTM, "centroid": [15.0, 59.5]}}
    return StageContext(config=config, survey=Survey(tmp_path), table=table, state=state)


def _table(n=30, seed=2, column="gravity"):
    rng = np.random.default_rng(seed)
    lat = rng.uniform(59.4, 59.6, n)
    h = rng.uniform(0.0, 900.0, n)
    table = pd.DataFrame(
        {
            "time": np.datetime64("2024-05-02T08:00", "ns") + np.arange(n) * np.timedelta64(300, "s"),
            "longitude": 15.0 + rng.uniform(-0.01, 0.01, n),
            "latitude": lat,
            "height": h,
            "easting": E0 + 2000.0 + rng.uniform(-200, 200, n),
            "northing": N0 + 2000.0 + rng.uniform(-200, 200, n),
            "line": "L1",
            "station": [f"S{i}" for i in range(n)],
            "source_file": "raw/g.csv",
            "source_row": np.arange(n) + 2,
        }
    )
    table[column] = 981_900.0 - 0.25 * h + rng.normal(0, 2, n)
    return table


def test_columns_against_boule_and_hinze_2005(tmp_path):
    table = _table()
    before = table.copy()
    out = run(_ctx(tmp_path, table, {"bouguer": "slab", "ellipsoid": "GRS80"}))
    t = out.table
    g, lat, h = table.gravity.to_numpy(), table.latitude.to_numpy(), table.height.to_numpy()
    # reference library: boule 0.6 GRS80 closed form (Li and Goetze 2001)
    gamma_h = boule.GRS80.normal_gravity((None, lat, h))
    gamma_0 = boule.GRS80.normal_gravity((None, lat, np.zeros_like(h)))
    np.testing.assert_allclose(t.normal_gravity, gamma_h, rtol=0, atol=1e-3)
    np.testing.assert_allclose(t.disturbance, g - gamma_h, rtol=0, atol=1e-3)
    # Hinze et al. (2005): atmospheric 0.874 - 9.9e-5 h + 3.56e-9 h^2; free-air 0.3086 h
    # (common practice); slab 2 pi G rho h with G = 6.6743e-11
    atm = 0.874 - 9.9e-5 * h + 3.56e-9 * h**2
    free_air = g - gamma_0 + 0.3086 * h + atm
    np.testing.assert_allclose(t.atmospheric, atm, rtol=0, atol=1e-12)
    np.testing.assert_allclose(t.free_air_anomaly, free_air, rtol=0, atol=1e-3)
    slab = 2 * np.pi * 6.6743e-11 * 2670.0 * h * 1e5
    np.testing.assert_allclose(t.bouguer, slab, rtol=1e-12)
    np.testing.assert_allclose(t.bouguer_anomaly, free_air - slab, rtol=0, atol=1e-3)
    assert t.terrain.isna().all()
    assert out.state["bouguer_anomaly"] == "simple" and out.state["height_type"] == "ellipsoidal"
    assert any("simple" in note for note in out.notes)
    assert not t.flag_reference_missing.any()
    # the input table is untouched and every original column kept as it was
    pd.testing.assert_frame_equal(table, before)
    pd.testing.assert_frame_equal(t[before.columns], before)
    assert len(t) == len(table)


def test_cap_and_options(tmp_path):
    table = _table()
    cap = run_gravity(_ctx(tmp_path, table)).table  # defaults: WGS84, cap, atmospheric
    slab = run_gravity(
        _ctx(tmp_path, table, {"bouguer": "slab", "atmospheric": False, "free_air_order": "second"})
    ).table
    h, lat = table.height.to_numpy(), table.latitude.to_numpy()
    # LaFehr (1991): the cap exceeds the slab by the curvature term, 0 .. +1.2 mGal below 900 m
    diff = cap.bouguer - slab.bouguer
    assert np.all(diff >= 0) and np.all(diff < 1.2)
    assert (slab.atmospheric == 0).all()
    # Hinze et al. (2005) eq. 4 second-order free-air correction
    fac2 = (0.3087691 - 0.0004398 * np.sin(np.radians(lat)) ** 2) * h - 7.2125e-8 * h**2
    gamma_0 = boule.WGS84.normal_gravity((None, lat, np.zeros_like(h)))
    np.testing.assert_allclose(slab.free_air_anomaly, table.gravity - gamma_0 + fac2, atol=1e-3)


def test_reading_is_used_without_a_drift_stage_and_counter_units_are_refused(tmp_path):
    table = _table(column="reading")
    out = run_gravity(_ctx(tmp_path, table))
    assert out.state["gravity_source"] == "reading"
    assert any("no tide, drift or base tie" in note for note in out.notes)
    assert np.isfinite(out.table.bouguer_anomaly).all()
    with pytest.raises(StageError) as info:
        run_gravity(_ctx(tmp_path, table, units={"reading": "cu"}))
    assert "\n" not in str(info.value) and "drift" in str(info.value)
    with pytest.raises(StageError, match="latitude"):
        run_gravity(_ctx(tmp_path, table.drop(columns="latitude")))


def test_missing_inputs_are_flagged_not_dropped(tmp_path):
    table = _table()
    table.loc[3, "height"] = np.nan
    table.loc[5, "gravity"] = np.nan
    out = run_gravity(_ctx(tmp_path, table))
    t = out.table
    assert len(t) == len(table)
    assert t.flag_reference_missing.tolist() == [i in (3, 5) for i in range(len(t))]
    assert np.isnan(t.bouguer_anomaly[3]) and np.isnan(t.bouguer_anomaly[5])
    assert out.metrics["readings_used"] == len(t) - 2
    assert out.warnings


def _write_dem(tmp_path, geoid_level=100.0):
    spacing = 50.0
    east = E0 + spacing * (np.arange(80) + 0.5)
    north = N0 + spacing * (np.arange(80) + 0.5)
    z = np.full((80, 80), geoid_level)
    z[40:44, 50:56] = geoid_level + 150.0  # hill: N0+2000..2200, E0+2500..2800
    write_netcdf(
        tmp_path / "dem.nc", make_grid(east, north, z, name="elevation", units="m", long_name="DEM"), UTM
    )
    return [E0 + 2500, E0 + 2800, N0 + 2000, N0 + 2200]


def test_complete_bouguer_with_a_dem(tmp_path):
    footprint = _write_dem(tmp_path)
    n = 3
    table = _table(n)
    # stations on the flat DEM surface: 100 m above the geoid + N = 20 m -> 120 m ellipsoidal
    table["height"] = 120.0
    reference = {
        "dem_file": "dem.nc",
        "terrain_radius_m": 1500.0,
        "terrain_inner_radius_m": 1500.0,
        "terrain_curvature": False,
    }
    out = run_gravity(_ctx(tmp_path, table, reference, survey={"geoid_undulation": 20.0}))
    t = out.table
    coords = (table.easting.to_numpy(), table.northing.to_numpy(), table.height.to_numpy())
    # reference library: harmonica prism (Nagy et al. 2000); the hill above the stations pulls
    # upward, the terrain correction is minus its g_z (positive, common practice)
    hill = harmonica.prism_gravity(coords, footprint + [120.0, 270.0], 2670.0, field="g_z")
    np.testing.assert_allclose(t.terrain, -hill, rtol=1e-9)
    assert (t.terrain > 0).all()
    np.testing.assert_allclose(t.bouguer_anomaly, t.free_air_anomaly - t.bouguer + t.terrain)
    assert out.state["bouguer_anomaly"] == "complete"
    assert out.state["terrain"]["dem_height_offset_m"] == 20.0
    assert all(c.passed for c in out.checks)


def test_dem_not_covering_the_radius_warns_and_fails_its_check(tmp_path):
    _write_dem(tmp_path)
    out = run_gravity(_ctx(tmp_path, _table(3), {"dem_file": "dem.nc"}))
    assert out.warnings and "terrain_radius_m" in out.warnings[0]
    check = [c for c in out.checks if c.name == "terrain_dem_missing_fraction"][0]
    assert not check.passed and check.value > 0.9
    assert np.isfinite(out.table.terrain).all()


def test_missing_dem_file_is_a_clear_error(tmp_path):
    with pytest.raises(InputDataError) as info:
        run_gravity(_ctx(tmp_path, _table(3), {"dem_file": "nowhere.tif"}))
    assert "nowhere.tif" in str(info.value) and "\n" not in str(info.value)


def test_reference_config_fields_are_validated():
    from potfield.errors import ConfigError

    with pytest.raises(ConfigError) as info:
        parse_config({"survey": {"kind": "gravity"}, "reference": {"density": -5.0}})
    assert "reference.density" in str(info.value) and "\n" not in str(info.value)
    with pytest.raises(ConfigError, match="terrain_radius_m"):
        parse_config({"survey": {"kind": "gravity"}, "reference": {"terrain_radius": 1.0}})
    cfg = parse_config({"survey": {"kind": "gravity"}}).reference
    assert (cfg.bouguer, cfg.terrain_radius_m, cfg.terrain_curvature) == ("cap", 166_700.0, True)
