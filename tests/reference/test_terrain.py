"""Terrain correction (potfield.fields.gravity.terrain) against harmonica prisms and closed-form
cylinder/ring attractions, and DEM reading (potfield.io.dem) with pyproj as reference."""

from __future__ import annotations

import harmonica
import numpy as np
import pandas as pd
import pyproj
import pytest
import xarray as xr

from potfield.errors import CRSError, InputDataError, PotfieldError
from potfield.fields.gravity.reductions import G, bouguer_cap
from potfield.fields.gravity.terrain import terrain_correction
from potfield.io.dem import read_dem
from potfield.io.grids import make_grid, write_geotiff, write_netcdf

RHO = 2670.0
KGM = 2 * np.pi * G * RHO * 1e5  # 2 pi G rho in mGal/m


def _dem(values, spacing, x0=0.0, y0=0.0):
    ny, nx = values.shape
    east = x0 + spacing * (np.arange(nx) + 0.5)
    north = y0 + spacing * (np.arange(ny) + 0.5)
    return make_grid(east, north, values, name="elevation", units="m", long_name="DEM")


def _square(n, spacing, value=0.0):
    return np.full((n, n), value, dtype=float), spacing


def test_single_hill_and_pit_against_harmonica_prisms():
    z, s = _square(80, 25.0)
    z[40:44, 50:60] = 180.0  # hill east of the station
    z[20:26, 30:34] = -90.0  # pit south-west
    dem = _dem(z, s)
    station = (1012.0, 1010.0, 0.0)
    result = terrain_correction(
        *[[c] for c in station], dem, radius=950.0, inner_radius=950.0, curvature=False
    )
    # reference library: harmonica.prism_gravity (Nagy et al. 2000 closed form). The hill pulls
    # up (g_z < 0), the pit removes mass below (g_z > 0 of the missing prism): TC = -g_hill +
    # g_pit, both positive
    hill = harmonica.prism_gravity(station, [1250, 1500, 1000, 1100, 0, 180], RHO, field="g_z")
    pit = harmonica.prism_gravity(station, [750, 850, 500, 650, -90, 0], RHO, field="g_z")
    assert -hill > 0 and pit > 0
    assert result.correction[0] == pytest.approx(-hill + pit, rel=1e-10)
    assert result.missing_fraction[0] == pytest.approx(0.0, abs=1e-12)


def test_coarse_zone_is_exact_for_block_aligned_terrain():
    # 4 x 4 block means of a hill aligned with the blocks equal the hill: a station whose
    # coarse zone holds the hill must give the same answer as harmonica on the fine prisms
    z, s = _square(256, 20.0, 50.0)
    z[192:208, 16:32] = 250.0  # 16 x 16 cells: one block of the third zone, 4 x 4 of the second
    dem = _dem(z, s)
    station = (2570.0, 2570.0, 50.0)
    result = terrain_correction(
        [station[0]],
        [station[1]],
        [50.0],
        dem,
        radius=3000.0,
        inner_radius=300.0,
        far_ratio=4.0,
        curvature=False,
    )
    assert len(result.zone_spacings) >= 2
    assert result.zone_inner_distance[-1] < np.hypot(2570 - 640, 3840 - 2570)
    hill = harmonica.prism_gravity(station, [320, 640, 3840, 4160, 50, 250], RHO, field="g_z")
    assert result.correction[0] == pytest.approx(-hill, rel=1e-9)


def test_hammer_ring_hill_and_valley():
    # Hammer (1939) ring: a ring of height H between radii a1 and a2 around a station at its
    # base gives 2 pi G rho [(a2 - a1) + sqrt(a1^2 + H^2) - sqrt(a2^2 + H^2)]; a valley ring of
    # depth H gives the same by symmetry. Pixelated ring on a 10 m DEM: 1 % (measured 0.3 %).
    s = 10.0
    z, _ = _square(220, s)
    e = s * (np.arange(220) + 0.5) - 1100.0
    east, north = np.meshgrid(e, e)
    r = np.hypot(east, north)
    a1, a2, height = 200.0, 1000.0, 100.0
    ring = (r >= a1) & (r < a2)
    expected = KGM * ((a2 - a1) + np.sqrt(a1**2 + height**2) - np.sqrt(a2**2 + height**2))
    for sign in (1.0, -1.0):
        dem = _dem(np.where(ring, sign * height, 0.0), s, -1100.0, -1100.0)
        result = terrain_correction(
            [0.0], [0.0], [0.0], dem, radius=1100.0, inner_radius=1100.0, curvature=False
        )
        assert result.correction[0] == pytest.approx(expected, rel=0.01)


def test_flat_terrain_below_a_raised_point_is_a_disc():
    # Telford, Geldart and Sheriff (1990) Applied Geophysics, vertical cylinder on its axis:
    # a point on the top of a disc of radius a and thickness H feels 2 pi G rho (H + a -
    # sqrt(a^2 + H^2)). Here: flat ground at 0 and the point at H (ground=NaN keeps the DEM
    # under the point) with multi-zone prisms to a = 20 km.
    z, s = _square(440, 100.0)
    dem = _dem(z, s, -22_000.0, -22_000.0)
    a, height = 20_000.0, 300.0
    result = terrain_correction(
        [0.0], [0.0], [height], dem, radius=a, inner_radius=1000.0, curvature=False, ground=np.nan
    )
    expected = KGM * (height + a - np.sqrt(a**2 + height**2))
    # the disc edge is a staircase of the outermost cells: 0.1 %
    assert result.correction[0] == pytest.approx(expected, rel=1e-3)


def test_curvature_makes_flat_terrain_a_spherical_cap():
    # with the curvature drop d^2/(2R), a point at H above flat terrain at sea level feels the
    # spherical cap to 166.7 km (LaFehr 1991 / potfield.fields.gravity.reductions.bouguer_cap, which is
    # checked against LaFehr's closed form and a numerical integral in test_reductions.py);
    # without it, the flat disc (Telford et al. 1990). Measured 0.007 mGal off the cap.
    z, s = _square(340, 1000.0)
    dem = _dem(z, s, -170_000.0, -170_000.0)
    height, radius = 1500.0, 166_735.0
    curved = terrain_correction([0.0], [0.0], [height], dem, radius=radius, ground=np.nan)
    flat = terrain_correction([0.0], [0.0], [height], dem, radius=radius, ground=np.nan, curvature=False)
    assert curved.correction[0] == pytest.approx(bouguer_cap(height), abs=0.05)
    disc = KGM * (height + radius - np.sqrt(radius**2 + height**2))
    assert flat.correction[0] == pytest.approx(disc, abs=0.05)
    assert curved.correction[0] - flat.correction[0] > 1.5


def test_station_inside_its_dem_cell_gets_no_self_attraction():
    # pitfall (references.md): a station below the mean of its own DEM cell must not sit inside
    # that prism's mass. Flat terrain with the station's cell 40 m higher: nothing to correct.
    z, s = _square(60, 30.0, 100.0)
    z[30, 30] = 140.0
    dem = _dem(z, s)
    station_e, station_n = 30 * 30.0 + 10.0, 30 * 30.0 + 20.0
    result = terrain_correction(
        [station_e], [station_n], [100.0], dem, radius=800.0, inner_radius=800.0, curvature=False
    )
    assert result.correction[0] == pytest.approx(0.0, abs=1e-12)
    # keeping the DEM value (ground = NaN) would put the station at the base of a 40 m
    # prism: the upward pull of that prism (harmonica), not a ground-station terrain effect
    kept = terrain_correction(
        [station_e],
        [station_n],
        [100.0],
        dem,
        radius=800.0,
        inner_radius=800.0,
        curvature=False,
        ground=np.nan,
    )
    own = harmonica.prism_gravity(
        (station_e, station_n, 100.0), [900, 930, 900, 930, 100, 140], RHO, field="g_z"
    )
    assert kept.correction[0] == pytest.approx(-own, rel=1e-10)
    assert kept.correction[0] > 1.0  # a large spurious value (common practice: avoid it)


def test_dem_not_covering_the_radius_is_reported():
    z, s = _square(40, 50.0, 0.0)
    dem = _dem(z, s)
    # a station at the DEM corner misses about 3/4 of a disc that the DEM could hold
    result = terrain_correction(
        [0.0, 1000.0], [0.0, 1000.0], [0.0, 0.0], dem, radius=900.0, inner_radius=900.0
    )
    assert result.missing_fraction[0] == pytest.approx(0.75, abs=0.03)
    assert result.missing_fraction[1] == pytest.approx(0.0, abs=1e-12)
    assert len(result.warnings) == 1
    assert "1 of 2 stations" in result.warnings[0] and "terrain_radius_m" in result.warnings[0]


def test_smooth_terrain_zones_agree_with_full_resolution():
    # internal consistency of the zone pyramid on smooth terrain (outside-source checks are
    # above): coarse zones within 1 % of the all-fine answer
    s = 20.0
    e = s * (np.arange(300) + 0.5)
    east, north = np.meshgrid(e, e)
    z = 400.0 + 150.0 * np.sin(east / 900.0) * np.cos(north / 700.0)
    dem = _dem(z, s)
    xs, ys = np.array([3000.0, 2500.0]), np.array([3000.0, 3300.0])
    hs = 400.0 + 150.0 * np.sin(xs / 900.0) * np.cos(ys / 700.0)
    fine = terrain_correction(xs, ys, hs, dem, radius=2500.0, inner_radius=2500.0)
    zoned = terrain_correction(xs, ys, hs, dem, radius=2500.0, inner_radius=400.0)
    assert len(zoned.zone_spacings) > 1 and np.all(fine.correction > 0.5)
    np.testing.assert_allclose(zoned.correction, fine.correction, rtol=0.01)


def test_bad_dem_grids_are_refused():
    z, s = _square(10, 50.0)
    dem = _dem(z, s)
    with pytest.raises(ValueError):
        terrain_correction([0.0], [0.0], [0.0], dem.isel(easting=[0, 1, 3]))
    with pytest.raises(ValueError):
        terrain_correction([0.0, 1.0], [0.0], [0.0], dem)
    out = terrain_correction([np.nan, 250.0], [0.0, 250.0], [0.0, 0.0], dem, radius=200.0)
    assert np.isnan(out.correction[0]) and np.isfinite(out.correction[1])


# --- DEM files ---------------------------------------------------------------------------------
UTM = "EPSG:32633"


def _utm_dem():
    z = np.add.outer(np.arange(6) * 10.0, np.arange(8) * 1.0) + 200.0
    return make_grid(
        500_000.0 + 100.0 * np.arange(8),
        6_600_000.0 + 100.0 * np.arange(6),
        z,
        name="elevation",
        units="m",
        long_name="DEM",
    )


def test_read_netcdf_geotiff_and_xyz_in_the_survey_crs(tmp_path):
    grid = _utm_dem()
    write_netcdf(tmp_path / "dem.nc", grid, UTM)
    write_geotiff(tmp_path / "dem.tif", grid, UTM)
    east, north = np.meshgrid(grid.easting.values, grid.northing.values)
    pd.DataFrame({"x": east.ravel(), "y": north.ravel(), "z": grid.values.ravel()}).to_csv(
        tmp_path / "dem.xyz", sep=" ", index=False
    )
    for name in ("dem.nc", "dem.tif", "dem.xyz"):
        dem = read_dem(tmp_path / name, UTM)
        assert dem.dims == ("northing", "easting")
        np.testing.assert_allclose(dem.easting, grid.easting)
        np.testing.assert_allclose(dem.northing, grid.northing)
        np.testing.assert_allclose(dem.values, grid.values)
        assert pyproj.CRS.from_wkt(dem.attrs["crs"]).equals(pyproj.CRS(UTM))


def test_geographic_dem_is_reprojected_with_pyproj(tmp_path):
    # a DEM linear in longitude and latitude: bilinear resampling is exact, so every node of the
    # UTM grid must hold f(lon, lat) of its own position (pyproj: reference transform)
    lon = 14.90 + 0.01 * np.arange(21)
    lat = 59.45 + 0.005 * np.arange(21)
    z = 100.0 + 3000.0 * (lon[None, :] - 14.9) + 5000.0 * (lat[:, None] - 59.45)
    geo = xr.Dataset(
        {"elevation": (("lat", "lon"), z)},
        coords={
            "lon": ("lon", lon, {"units": "degrees_east"}),
            "lat": ("lat", lat, {"units": "degrees_north"}),
        },
    )
    geo.to_netcdf(tmp_path / "geo.nc")
    dem = read_dem(tmp_path / "geo.nc", UTM)
    ee, nn = np.meshgrid(dem.easting.values, dem.northing.values)
    glon, glat = pyproj.Transformer.from_crs(UTM, "EPSG:4326", always_xy=True).transform(ee, nn)
    expected = 100.0 + 3000.0 * (glon - 14.9) + 5000.0 * (glat - 59.45)
    good = np.isfinite(dem.values)
    assert good.mean() > 0.5
    np.testing.assert_allclose(dem.values[good], expected[good], rtol=0, atol=1e-6)
    spacing = np.diff(dem.easting.values)
    assert 200.0 < spacing.mean() < 600.0 and np.ptp(spacing) < 1e-6
    # the same file, its CRS declared in survey.toml (dem_crs), gives the same grid
    again = read_dem(tmp_path / "geo.nc", UTM, dem_crs="EPSG:4326")
    np.testing.assert_array_equal(np.isfinite(again.values), good)


def test_dem_in_another_projected_crs_found_in_the_file(tmp_path):
    # a DEM linear in UTM 33 coordinates, stored with its CRS (NetCDF-CF grid mapping and
    # GeoTIFF), read for a survey in UTM 34: every node must hold f at its UTM 33 position
    # (pyproj: reference transform)
    grid = _utm_dem()
    write_netcdf(tmp_path / "dem.nc", grid, UTM)
    write_geotiff(tmp_path / "dem.tif", grid, UTM)
    back = pyproj.Transformer.from_crs("EPSG:32634", UTM, always_xy=True)
    for name in ("dem.nc", "dem.tif"):
        dem = read_dem(tmp_path / name, "EPSG:32634")
        assert pyproj.CRS(dem.attrs["source_crs"]).equals(pyproj.CRS(UTM))
        ee, nn = np.meshgrid(dem.easting.values, dem.northing.values)
        x, y = back.transform(ee, nn)
        expected = 200.0 + 10.0 * (y - 6_600_000.0) / 100.0 + (x - 500_000.0) / 100.0
        good = np.isfinite(dem.values)
        assert good.sum() >= 4
        np.testing.assert_allclose(dem.values[good], expected[good], rtol=0, atol=1e-6)


def test_dem_errors_are_one_line_potfield_errors(tmp_path):
    with pytest.raises(InputDataError, match="not found"):
        read_dem(tmp_path / "missing.nc", UTM)
    (tmp_path / "empty.tif").write_bytes(b"")
    with pytest.raises(InputDataError, match="empty"):
        read_dem(tmp_path / "empty.tif", UTM)
    (tmp_path / "dem.las").write_text("1 2 3\n")
    with pytest.raises(InputDataError, match="format"):
        read_dem(tmp_path / "dem.las", UTM)
    # degrees without a CRS while the survey is projected
    lon, lat = np.meshgrid(15.0 + 0.01 * np.arange(4), 59.0 + 0.01 * np.arange(3))
    pd.DataFrame({"x": lon.ravel(), "y": lat.ravel(), "z": 1.0}).to_csv(tmp_path / "geo.xyz", index=False)
    with pytest.raises(CRSError) as info:
        read_dem(tmp_path / "geo.xyz", UTM)
    assert "reference.dem_crs" in str(info.value) and "\n" not in str(info.value)
    with pytest.raises(CRSError, match="pyproj"):
        read_dem(tmp_path / "geo.xyz", UTM, dem_crs="EPSG:notacode")
    # an irregular x,y,z table
    pd.DataFrame({"x": [0.0, 1.0, 3.0, 0.0, 1.0, 3.0], "y": [0.0] * 3 + [1.0] * 3, "z": 1.0}).to_csv(
        tmp_path / "bad.xyz", index=False
    )
    with pytest.raises(InputDataError, match="evenly spaced"):
        read_dem(tmp_path / "bad.xyz", UTM)
    # a NetCDF without a 2-D variable
    xr.Dataset({"v": ("x", np.arange(3.0))}).to_netcdf(tmp_path / "one.nc")
    with pytest.raises(PotfieldError, match="2-D"):
        read_dem(tmp_path / "one.nc", UTM)
