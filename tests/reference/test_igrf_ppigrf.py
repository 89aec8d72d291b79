"""IGRF-14 synthesis checked against independent reference libraries (ppigrf 2.1, chaosmagpy).

Time mapping: ppigrf interpolates its coefficient table linearly in elapsed days between the
epoch dates (1 January of 1900, 1905, ...), while potfield (like the IAGA synthesis programs)
interpolates linearly in decimal years. Both are "linear between epochs"; they differ by up to
~0.2 nT inside an interval because calendar years differ in length. To compare the *synthesis*
to 0.01 nT, each decimal year is handed to ppigrf as the datetime at the same fraction of the
same epoch interval. At the epoch dates themselves the two coincide exactly, which
``test_datetime_input_at_epoch_dates`` uses to check the datetime path too.
"""

from __future__ import annotations

import datetime as dt
import warnings

import numpy as np
import pytest

ppigrf = pytest.importorskip("ppigrf")

from potfield.fields.magnetic.igrf import (  # noqa: E402
    coefficients,
    decimal_year,
    igrf,
    igrf_geocentric,
)

TOL_NT = 0.01


def _ppigrf_date(year: float) -> dt.datetime:
    """The datetime at which ppigrf's day-linear interpolation uses the same epoch fraction."""
    k = min(int((year - 1900.0) // 5), 25)
    frac = (year - 1900.0) / 5.0 - k
    start, end = dt.datetime(1900 + 5 * k, 1, 1), dt.datetime(1905 + 5 * k, 1, 1)
    return start + (end - start) * frac


def _ppigrf_geodetic(lon, lat, height_m, year):
    """ppigrf north, east, down (nT); ppigrf takes km and returns east, north, up."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        be, bn, bu = ppigrf.igrf(lon, lat, np.asarray(height_m) / 1000.0, _ppigrf_date(year))
    return bn[0], be[0], -bu[0]


@pytest.fixture(scope="module")
def random_points():
    """1200 points: all latitudes (uniform on the sphere plus points within 0.01 deg of the
    poles), heights 0-20 km, 60 dates spread over 1900-2030 (20 points per date)."""
    rng = np.random.default_rng(20240601)
    n_dates, per_date = 60, 20
    n = n_dates * per_date
    lon = rng.uniform(-180.0, 180.0, n)
    lat = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    near_pole = rng.choice(n, 60, replace=False)
    lat[near_pole] = np.sign(rng.uniform(-1, 1, 60)) * rng.uniform(89.99, 90.0, 60)
    lat[0] = -90.0  # the south pole exactly (ppigrf is finite there)
    height = rng.uniform(0.0, 20_000.0, n)
    dates = np.sort(rng.uniform(1900.0, 2030.0, n_dates))
    dates[0], dates[-1] = 1900.0, 2030.0
    year = np.repeat(dates, per_date)
    return lon, lat, height, year, dates, per_date


def test_random_points_agree_with_ppigrf(random_points):
    lon, lat, height, year, dates, per_date = random_points
    ours = igrf(lon, lat, height, year)  # one call, a date per point
    ref = np.empty((3, lon.size))
    for i, date in enumerate(dates):  # loop over dates in the TEST only (ppigrf takes one date)
        sl = slice(i * per_date, (i + 1) * per_date)
        ref[:, sl] = _ppigrf_geodetic(lon[sl], lat[sl], height[sl], date)
    total_ref = np.sqrt((ref**2).sum(axis=0))
    # Reference library: ppigrf 2.1 (Laundal), IGRF-14 coefficients, to 0.01 nT per component.
    np.testing.assert_allclose(ours.north, ref[0], rtol=0, atol=TOL_NT)
    np.testing.assert_allclose(ours.east, ref[1], rtol=0, atol=TOL_NT)
    np.testing.assert_allclose(ours.down, ref[2], rtol=0, atol=TOL_NT)
    np.testing.assert_allclose(ours.total, total_ref, rtol=0, atol=TOL_NT)
    # The field is large there, so the check has teeth (IGRF F is 22,000-67,000 nT; from memory).
    assert 20_000 < np.min(ours.total) and np.max(ours.total) < 70_000


def test_north_pole_against_ppigrf_limit():
    # ppigrf divides by sin(theta) and is NaN exactly at +90; its value 1e-7 degree away along
    # the same meridian is the limit (the field changes by ~1e-4 nT over 1 cm).
    lon = np.array([0.0, 45.0, 135.0, -100.0])
    ours = igrf(lon, 90.0, 1000.0, 2023.4)
    north, east, down = _ppigrf_geodetic(lon, np.full(4, 90.0 - 1e-7), np.full(4, 1000.0), 2023.4)
    # Reference library: ppigrf 2.1.
    np.testing.assert_allclose(ours.north, north, atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.east, east, atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.down, down, atol=TOL_NT, rtol=0)
    assert np.all(np.isfinite(ours.east))


def test_datetime_input_at_epoch_dates():
    lon, lat, h = np.array([10.0, -70.0, 150.0]), np.array([60.0, -33.0, 5.0]), np.array([0.0, 500.0, 3000.0])
    for year in (1955, 2000, 2020, 2025):
        when = np.datetime64(f"{year}-01-01T00:00")
        ours = igrf(lon, lat, h, when)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            be, bn, bu = ppigrf.igrf(lon, lat, h / 1000.0, dt.datetime(year, 1, 1))
        # Reference library: ppigrf 2.1 (both interpolations coincide at epoch dates).
        np.testing.assert_allclose(ours.north, bn[0], atol=TOL_NT, rtol=0)
        np.testing.assert_allclose(ours.east, be[0], atol=TOL_NT, rtol=0)
        np.testing.assert_allclose(ours.down, -bu[0], atol=TOL_NT, rtol=0)


def test_geocentric_synthesis_agrees_with_ppigrf_gc():
    rng = np.random.default_rng(7)
    r_m = rng.uniform(6_356_000.0, 6_420_000.0, 300)
    theta = rng.uniform(0.5, 179.5, 300)
    phi = rng.uniform(-180, 180, 300)
    year = 2012.3
    ours = igrf_geocentric(r_m, theta, phi, year)
    br, bt, bp = ppigrf.igrf_gc(r_m / 1000.0, theta, phi, _ppigrf_date(year))
    # Reference library: ppigrf 2.1 igrf_gc (geocentric radial, south, east components).
    np.testing.assert_allclose(ours.radial, br[0], atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.theta, bt[0], atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.phi, bp[0], atol=TOL_NT, rtol=0)


def test_geodetic_rotation_against_chaosmagpy(monkeypatch):
    """Geocentric -> geodetic: positions and the rotation of the vector by psi = phi - phi_c
    (Langel 1987 eqs. 51-53; Hulot et al. 2015 eq. 4) through chaosmagpy's own implementation."""
    chaosmagpy = pytest.importorskip("chaosmagpy")
    from chaosmagpy import coordinate_utils as cu

    a_km = 6378.137
    # chaosmagpy rounds the polar radius to 1 m; use exact WGS84 so positions coincide.
    monkeypatch.setitem(
        chaosmagpy.basicConfig, "params.ellipsoid", np.array([a_km, a_km * (1 - 1 / 298.257223563)])
    )
    rng = np.random.default_rng(11)
    lat = rng.uniform(-89.0, 89.0, 400)
    lon = rng.uniform(-180, 180, 400)
    h = rng.uniform(0, 20_000, 400)
    year = 2018.6
    radius_km, theta = cu.gg_to_geo(h / 1000.0, 90.0 - lat)
    sph = igrf_geocentric(radius_km * 1000.0, theta, lon, year)
    _, _, x_ref, z_ref = cu.geo_to_gg(radius_km, theta, sph.radial, sph.theta)
    ours = igrf(lon, lat, h, year)
    # Reference library: chaosmagpy coordinate_utils (gg_to_geo / geo_to_gg).
    np.testing.assert_allclose(ours.north, x_ref, atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.down, z_ref, atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.east, sph.phi, atol=1e-9, rtol=0)
    # The check is sensitive: rotating by -psi instead (the classic sign slip) is off by tens of
    # nT at mid latitudes (references.md: about 75 nT).
    xs, zs = -sph.theta, -sph.radial
    psi = np.radians(lat - (90.0 - theta))
    wrong_x = xs * np.cos(psi) - zs * np.sin(psi)
    assert np.max(np.abs(wrong_x - x_ref)) > 50.0


@pytest.mark.filterwarnings("ignore:Input coordinates include the poles")
def test_synthesis_agrees_with_chaosmagpy_including_poles():
    pytest.importorskip("chaosmagpy")
    from chaosmagpy.model_utils import synth_values

    year = 2025.0
    g, h = coefficients(year)
    flat = []
    for n in range(1, 14):  # chaosmagpy order: g_n^0, g_n^1, h_n^1, g_n^2, h_n^2, ...
        flat.append(g[n, 0])
        for m in range(1, n + 1):
            flat += [g[n, m], h[n, m]]
    theta = np.array([0.0, 0.0, 180.0, 1e-3, 37.0, 90.0, 143.0])
    phi = np.array([0.0, 120.0, -60.0, 33.0, -71.0, 10.0, 160.0])
    radius_km = np.full(theta.shape, 6371.2)
    br, bt, bp = synth_values(np.array(flat), radius_km, theta, phi)
    ours = igrf_geocentric(radius_km * 1000.0, theta, phi, year)
    # Reference library: chaosmagpy model_utils.synth_values (defined at the poles too).
    np.testing.assert_allclose(ours.radial, br, atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.theta, bt, atol=TOL_NT, rtol=0)
    np.testing.assert_allclose(ours.phi, bp, atol=TOL_NT, rtol=0)


def test_coefficient_table_matches_ppigrf_shc():
    from ppigrf.ppigrf import read_shc

    gdf, hdf = read_shc()
    years = decimal_year(gdf.index.values)
    g, h = coefficients(years)
    for n, m in gdf.columns:
        # Reference data: the IGRF-14 table shipped with ppigrf 2.1 (all epochs and 2030).
        np.testing.assert_allclose(g[:, n, m], gdf[(n, m)].to_numpy(), atol=1e-9, rtol=0)
        np.testing.assert_allclose(h[:, n, m], hdf[(n, m)].to_numpy(dtype=float), atol=1e-9, rtol=0)
