"""potfield.fields.magnetic.igrf: coefficients, dates, ranges, broadcasting and field definitions."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from potfield.fields.errors import FieldError, OutOfModelRange
from potfield.fields.magnetic.igrf import (
    coefficients,
    decimal_year,
    geodetic_to_geocentric,
    igrf,
    igrf_geocentric,
)

# --- coefficients ---------------------------------------------------------------------------


def test_published_coefficients():
    g, h = coefficients(np.array([1900.0, 2025.0, 2030.0]))
    # IGRF-14 coefficient table (IAGA Working Group V-MOD 2024, doi:10.5281/zenodo.14012302).
    assert g[0, 1, 0] == -31543.0
    assert g[0, 1, 1] == -2298.0
    assert h[0, 1, 1] == 5922.0
    assert g[1, 1, 0] == -29350.0
    # IGRF-14: g10 SV 2025-2030 is +12.6 nT/yr, so g10(2030) = -29287.0.
    assert g[2, 1, 0] == pytest.approx(-29287.0, abs=1e-9)


def test_coefficients_linear_in_time_and_sv():
    g, _ = coefficients(np.array([1902.5, 2027.5]))
    # IGRF-14 table: g10(1900) = -31543, g10(1905) = -31464 -> midpoint -31503.5 (linear rule).
    assert g[0, 1, 0] == pytest.approx(-31503.5, abs=1e-9)
    # IGRF-14: g10(2025) = -29350.0 with SV +12.6 nT/yr -> -29318.5 at 2027.5.
    assert g[1, 1, 0] == pytest.approx(-29318.5, abs=1e-9)


def test_degree_10_before_1995_degree_13_after_2000():
    g, h = coefficients(np.array([1990.0, 2000.0]))
    # IGRF-14: models before 1995 are of degree 10; from 2000 of degree 13.
    assert np.all(g[0, 11:] == 0) and np.all(h[0, 11:] == 0)
    assert np.any(g[1, 13] != 0) and np.any(h[1, 13] != 0)
    # Never terms with m > n or n = 0, and no h_n^0 (definition of the expansion).
    assert np.all(np.triu(g[1], 1) == 0) and np.all(g[1, 0] == 0) and np.all(h[1, :, 0] == 0)


def test_field_continuous_across_the_1995_degree_change():
    # Degree 10 -> 13 terms enter linearly from 1995 on (the 1995 model is zero-padded):
    # the field is continuous at 1995.0 (IGRF-14 time rule; common practice).
    eps = 1e-7
    f = igrf(30.0, 45.0, 0.0, np.array([1995.0 - eps, 1995.0, 1995.0 + eps]))
    assert np.ptp(f.total) < 1e-3


# --- dates ----------------------------------------------------------------------------------


def test_decimal_year_definition():
    times = np.array(["2020-07-02T00:00", "2019-07-02T12:00", "2021-01-01", "NaT"], dtype="datetime64[ns]")
    years = decimal_year(times)
    # Decimal year = year + elapsed / length of that year (IGRF convention; 2020 has 366 days).
    assert years[0] == pytest.approx(2020.0 + 183 / 366, abs=1e-12)
    assert years[1] == pytest.approx(2019.5, abs=1e-12)
    assert years[2] == 2021.0
    assert np.isnan(years[3])
    assert decimal_year(2011.25) == 2011.25


def test_decimal_year_timezone_aware_pandas():
    pd = pytest.importorskip("pandas")
    aware = pd.Series(pd.to_datetime(["2020-01-01T01:00+01:00"], utc=True))
    assert decimal_year(aware)[0] == 2020.0  # 01:00+01:00 is midnight UTC (ISO 8601)


def test_datetime_and_decimal_year_inputs_agree():
    when = np.datetime64("2016-09-30T06:00")
    a = igrf(-60.0, -20.0, 300.0, when)
    b = igrf(-60.0, -20.0, 300.0, float(decimal_year(when)))
    assert a.total == b.total and a.declination == b.declination


def test_unreadable_time_is_a_field_error():
    with pytest.raises(FieldError):
        decimal_year(np.array(["yesterday"]))


# --- ranges ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "year", [1899.999, 2030.001, np.datetime64("2031-05-01"), np.datetime64("1850-01-01")]
)
def test_dates_outside_model_raise(year):
    with pytest.raises(OutOfModelRange, match="1900.0 to 2030.0"):
        igrf(0.0, 0.0, 0.0, year)
    with pytest.raises(OutOfModelRange):
        coefficients(year)


def test_range_ends_are_valid():
    f = igrf(0.0, 0.0, 0.0, np.array([1900.0, 2030.0]))
    assert np.all(np.isfinite(f.total))


def test_latitude_out_of_range_is_a_field_error():
    with pytest.raises(FieldError, match="outside \\[-90, 90\\]") as info:
        igrf(np.zeros(3), np.array([10.0, 91.0, 0.0]), 0.0, 2020.0)
    assert isinstance(info.value, FieldError)
    assert "\n" not in str(info.value)  # one-line message (project rule)


def test_nan_inputs_give_nan_not_errors():
    f = igrf(np.array([0.0, np.nan]), np.array([10.0, 10.0]), 0.0, np.array([2020.0, np.nan]))
    assert np.isfinite(f.total[0]) and np.isnan(f.total[1])


# --- shapes ---------------------------------------------------------------------------------


def test_scalars_give_0d_arrays():
    f = igrf(10.0, 50.0, 100.0, 2020.0)
    assert all(np.ndim(v) == 0 for v in f)
    assert 40_000 < float(f.total) < 60_000  # mid-latitude F (common practice: ~48,000 nT)


def test_broadcasting_matches_pointwise():
    lon = np.array([-30.0, 0.0, 60.0])
    lat = np.array([[-45.0], [20.0]])
    f = igrf(lon, lat, 500.0, 2010.5)
    assert f.total.shape == (2, 3)
    one = igrf(60.0, 20.0, 500.0, 2010.5)
    assert f.total[1, 2] == pytest.approx(float(one.total), abs=1e-9)
    times = np.array(["2001-01-01", "2021-01-01"], dtype="datetime64[ns]")
    f2 = igrf(0.0, 0.0, 0.0, times)
    assert f2.total.shape == (2,) and f2.total[0] != f2.total[1]


def test_empty_input():
    f = igrf(np.array([]), np.array([]), np.array([]), np.array([], dtype="datetime64[ns]"))
    assert f.total.shape == (0,)


# --- definitions ----------------------------------------------------------------------------


def test_intensity_inclination_declination_definitions():
    rng = np.random.default_rng(3)
    lon, lat = rng.uniform(-180, 180, 200), rng.uniform(-85, 85, 200)
    f = igrf(lon, lat, 0.0, 2022.0)
    # Definitions (e.g. Campbell 2003, Introduction to Geomagnetic Fields, CUP, ch. 1):
    # H = sqrt(X^2+Y^2), F = sqrt(H^2+Z^2), I = atan2(Z, H), D = atan2(Y, X).
    np.testing.assert_allclose(f.horizontal, np.hypot(f.north, f.east), rtol=1e-13)
    np.testing.assert_allclose(f.total, np.sqrt(f.north**2 + f.east**2 + f.down**2), rtol=1e-13)
    np.testing.assert_allclose(f.inclination, np.degrees(np.arctan2(f.down, f.horizontal)), atol=1e-10)
    np.testing.assert_allclose(f.declination, np.degrees(np.arctan2(f.east, f.north)), atol=1e-10)
    ppigrf = pytest.importorskip("ppigrf")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        inc, dec = ppigrf.get_inclination_declination(f.east, f.north, -f.down)
    # Reference library: ppigrf.get_inclination_declination. It takes D = arcsin(Y / H), which
    # only covers |D| <= 90 deg, so D is compared where X > 0 (near the magnetic poles |D| > 90).
    np.testing.assert_allclose(f.inclination, inc, atol=1e-9)
    north = f.north > 0
    assert north.sum() > 150 and (~north).sum() > 0
    np.testing.assert_allclose(f.declination[north], dec[north], atol=1e-9)
    np.testing.assert_allclose(np.sin(np.radians(f.declination)), np.sin(np.radians(dec)), atol=1e-9)


def test_field_signs_by_hemisphere():
    f = igrf(np.array([0.0, 0.0]), np.array([60.0, -60.0]), 0.0, 2020.0)
    # The field points down in the northern and up in the southern hemisphere, and north on the
    # equator, away from the South Atlantic (common practice: dipole field of the Earth).
    assert f.down[0] > 0 > f.down[1]
    assert f.inclination[0] > 60 and f.inclination[1] < -50
    eq = igrf(100.0, 0.0, 0.0, 2020.0)
    assert eq.north > 25_000 and abs(eq.inclination) < 30


def test_decrease_with_height_close_to_dipole():
    f = igrf(20.0, 40.0, np.array([0.0, 100_000.0]), 2020.0)
    r0, _ = geodetic_to_geocentric(40.0, 0.0)
    r1, _ = geodetic_to_geocentric(40.0, 100_000.0)
    # A dipole falls off as r^-3 (Blakely 1995, Potential Theory, CUP, ch. 4); the degree-1
    # term dominates the IGRF, so the ratio is within 2 % of (r0/r1)^3.
    assert f.total[1] / f.total[0] == pytest.approx((r0 / r1) ** 3, rel=0.02)


def test_geodetic_to_geocentric_known_values():
    r, lat_c = geodetic_to_geocentric(np.array([0.0, 90.0, 45.0]), 0.0)
    # WGS84: a = 6378137 m, b = 6356752.3142 m (NIMA TR8350.2, 2000).
    assert r[0] == pytest.approx(6378137.0, abs=1e-6)
    assert r[1] == pytest.approx(6356752.3142, abs=1e-3)
    assert lat_c[1] == pytest.approx(90.0, abs=1e-12)
    # On the ellipsoid tan(phi_c) = (1 - e^2) tan(phi) (Heiskanen and Moritz 1967, Physical
    # Geodesy, Freeman, sec. 5-3): at 45 deg the geocentric latitude is 0.19242 deg smaller.
    e2 = (1 / 298.257223563) * (2 - 1 / 298.257223563)
    expected = 45.0 - np.degrees(np.arctan((1 - e2) * np.tan(np.radians(45.0))))
    assert 45.0 - lat_c[2] == pytest.approx(expected, abs=1e-10)
    assert expected == pytest.approx(0.1924, abs=1e-4)


def test_geocentric_pole_is_finite_and_equals_geodetic_pole():
    r_pole, _ = geodetic_to_geocentric(90.0, 0.0)
    f = igrf_geocentric(r_pole, 0.0, 0.0, 2020.0)
    g = igrf(0.0, 90.0, 0.0, 2020.0)
    assert np.isfinite(f.phi)
    # At the pole geodetic and geocentric verticals coincide (psi = 0 there; Langel 1987).
    assert float(g.north) == pytest.approx(-float(f.theta), abs=1e-6)
    assert float(g.east) == pytest.approx(float(f.phi), abs=1e-6)
    assert float(g.down) == pytest.approx(-float(f.radial), abs=1e-6)


def test_geocentric_input_errors():
    with pytest.raises(FieldError):
        igrf_geocentric(6.4e6, 181.0, 0.0, 2020.0)
    with pytest.raises(FieldError):
        igrf_geocentric(-1.0, 10.0, 0.0, 2020.0)
