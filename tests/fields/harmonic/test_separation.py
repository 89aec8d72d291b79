"""Unit tests of potfield.fields.harmonic.separation and potfield.fields.harmonic.spherical: closed forms,
algebraic properties and user-input errors (the checks against reference libraries are in
tests/reference/test_separation_reference.py)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from potfield.fields.errors import FieldError
from potfield.fields.harmonic import spherical as sp
from potfield.fields.harmonic.separation import (
    coefficient_table,
    external_field_at,
    fit_gauss_coefficients,
    fit_two_layer,
    induction_ratio,
    nearest_station,
    regional_upward,
    remote_reference_caution,
    separate_two_heights,
    separate_vector_plane,
    two_layer_dampings,
)
from potfield.fields.magnetic.igrf import igrf
from potfield.io.grids import make_grid

LAT = np.array([60.0, 40.0, 15.0, -10.0, -35.0, -55.0, 25.0, 5.0])
LON = np.array([-120.0, -30.0, 20.0, 80.0, 150.0, -160.0, 110.0, -75.0])
HGT = np.zeros(LAT.size)


def _network(coefs_int, coefs_ext, lon=LON, lat=LAT, h=HGT):
    gi = sp.geodetic_design_matrices(lon, lat, h, sp.degree_of(coefs_int.shape[-1]), "internal")
    ge = sp.geodetic_design_matrices(lon, lat, h, sp.degree_of(coefs_ext.shape[-1]), "external")
    return [coefs_int @ a.T + coefs_ext @ b.T for a, b in zip(gi, ge)]


def test_uniform_external_field_closed_form():
    # External q10 alone: V = q10 r cos(theta), a uniform field B = -q10 along the axis, so at
    # the equator X = -q10 and Z = 0, at the north pole Z = q10 (Chapman and Bartels 1940; the
    # ring-current signature Dst ~ -q10 at low latitude).
    br, bt, bp = sp.synthesis(
        np.array([10.0, 0.0, 0.0]), 6371.2e3, np.array([90.0, 1e-9]), np.array([30.0, 0.0]), source="external"
    )
    np.testing.assert_allclose(-bt, [-10.0, 0.0], atol=1e-6)
    np.testing.assert_allclose(-br, [0.0, 10.0], atol=1e-6)
    # Internal g10 at r = a: an axial dipole, Z = -2 g10 at the north pole, X = -g10 at the equator
    br, bt, bp = sp.synthesis(
        np.array([10.0, 0.0, 0.0]), 6371.2e3, np.array([1e-9, 90.0]), np.array([0.0, 0.0])
    )
    np.testing.assert_allclose([-br[0], -bt[1]], [-20.0, -10.0], atol=1e-6)


def test_fit_is_exact_on_noise_free_data_and_groups_gaps():
    rng = np.random.default_rng(0)
    gi, qe = rng.normal(0, 5, (30, 3)), rng.normal(0, 20, (30, 3))
    north, east, down = _network(gi, qe)
    north[5:9, 2] = np.nan  # one station's X missing for 4 epochs
    down[12, [0, 3, 5]] = np.nan
    for comp in (north, east, down):
        comp[20, 1:] = np.nan  # epoch 20: one station only = 3 data < 6 unknowns
    fit = fit_gauss_coefficients(north, east, down, LON, LAT, HGT)
    assert fit.names == ["g10", "g11", "h11", "q10", "q11", "s11"]
    assert fit.groups == 4 and fit.unsolved_epochs == 1
    ok = np.arange(30) != 20
    # exact linear algebra: noise-free data give the coefficients to rounding
    np.testing.assert_allclose(fit.coefficients[ok], np.hstack([gi, qe])[ok], atol=1e-9)
    assert np.all(np.isnan(fit.coefficients[20]))
    assert np.nanmax(np.abs(fit.residual[:, ok])) < 1e-9
    table = coefficient_table(np.arange(30).astype("datetime64[m]"), fit)
    assert list(table.columns) == ["time", *fit.names] and table["time"].dtype == "datetime64[ns]"


def test_too_few_stations_is_a_clear_error():
    north, east, down = _network(np.ones((2, 8)), np.ones((2, 8)), LON[:3], LAT[:3], HGT[:3])
    with pytest.raises(FieldError) as err:
        fit_gauss_coefficients(
            north, east, down, LON[:3], LAT[:3], HGT[:3], internal_degree=2, external_degree=2
        )
    text = str(err.value)
    assert "16 Gauss coefficients" in text and "3 stations" in text and "9 components" in text
    assert "\n" not in text


def test_one_meridian_network_is_a_clear_error_unless_damped():
    lon = np.full(6, 25.0)
    lat = np.array([-60.0, -30.0, -5.0, 10.0, 40.0, 70.0])
    h = np.zeros(6)
    north, east, down = _network(np.ones((3, 3)), np.ones((3, 3)), lon, lat, h)
    with pytest.raises(FieldError, match="all 6 stations lie on longitude 25"):
        fit_gauss_coefficients(north, east, down, lon, lat, h)
    fit = fit_gauss_coefficients(north, east, down, lon, lat, h, damping=1e-2)
    assert np.all(np.isfinite(fit.coefficients))
    assert fit.condition > 100  # 1 / RANK_TOLERANCE: the undamped problem is unresolved


def test_bad_degrees_and_damping():
    north, east, down = _network(np.ones((1, 3)), np.ones((1, 3)))
    with pytest.raises(FieldError, match="internal_degree 0 and external_degree 0"):
        fit_gauss_coefficients(north, east, down, LON, LAT, HGT, internal_degree=0, external_degree=0)
    with pytest.raises(FieldError, match="damping"):
        fit_gauss_coefficients(north, east, down, LON, LAT, HGT, damping=-1.0)
    fit = fit_gauss_coefficients(north, east, down, LON, LAT, HGT, internal_degree=0)
    assert fit.names == ["q10", "q11", "s11"]


def test_induction_ratio_exact_line():
    x = np.linspace(-20, 100, 50)
    est = induction_ratio(0.3 * x + 2.0, x)  # a straight line: slope and offset exactly (algebra)
    assert est["ratio"] == pytest.approx(0.3) and est["offset"] == pytest.approx(2.0)
    assert est["correlation"] == pytest.approx(1.0)
    assert np.isnan(induction_ratio([1.0, 2.0], [1.0, 1.0])["ratio"])


def _coef_table(times, q10, ratio=0.0):
    return pd.DataFrame(
        {"time": times, "g10": ratio * q10, "g11": 0.0, "h11": 0.0, "q10": q10, "q11": 0.0, "s11": 0.0}
    )


def test_external_field_at_equator_is_minus_q10_along_north():
    times = np.datetime64("2024-03-01T00:00", "ns") + np.arange(5) * np.timedelta64(60, "s")
    q10 = np.array([10.0, 20.0, 30.0, 40.0, 50.0])
    table = _coef_table(times, q10, ratio=0.25)
    lon, lat = 40.0, 0.0
    dF = external_field_at(table, lon, lat, 0.0, times)
    main = igrf(lon, lat, 0.0, times)
    # closed form at the geodetic equator (psi = 0, r = 6378.137 km): external q10 gives
    # X = -q10, internal g10 gives X = -g10 (a/r)^3 (Chapman and Bartels 1940); dF = b . F/|F|.
    rho = 6371.2 / 6378.137
    expected = -(q10 + 0.25 * q10 * rho**3) * main.north / main.total
    np.testing.assert_allclose(dF, expected, rtol=1e-9)
    no_induced = external_field_at(table, lon, lat, 0.0, times, include_induced=False)
    np.testing.assert_allclose(no_induced, -q10 * main.north / main.total, rtol=1e-9)


def test_external_field_at_interpolates_and_refuses_outside():
    times = np.datetime64("2024-03-01T00:00", "ns") + np.arange(5) * np.timedelta64(60, "s")
    table = _coef_table(times.astype(str), np.array([10.0, 20.0, 30.0, 40.0, 50.0]))  # ISO text
    half = times[:2] + np.timedelta64(30, "s")
    dF = external_field_at(table, 40.0, 0.0, 0.0, half)
    main = igrf(40.0, 0.0, 0.0, half)
    np.testing.assert_allclose(dF, -np.array([15.0, 25.0]) * main.north / main.total, rtol=1e-9)
    outside = external_field_at(
        table, 40.0, 0.0, 0.0, [times[0] - np.timedelta64(1, "h"), times[-1] + np.timedelta64(1, "h")]
    )
    assert np.all(np.isnan(outside))
    gappy = table.drop(index=[1, 2, 3]).reset_index(drop=True)  # 4 min between epochs
    assert np.isnan(external_field_at(gappy, 40.0, 0.0, 0.0, times[2]))
    # a moving platform: positions broadcast with times
    moving = external_field_at(table, np.full(5, 40.0), np.linspace(0, 1, 5), np.zeros(5), times)
    assert moving.shape == (5,) and np.all(np.isfinite(moving))


def test_external_field_at_bad_tables():
    with pytest.raises(FieldError, match="no 'time' column"):
        external_field_at(pd.DataFrame({"q10": [1.0]}), 0, 0, 0, np.datetime64("2024-01-01"))
    bad = pd.DataFrame({"time": ["2024-01-01"], "q10": [1.0], "q11": [0.0]})
    with pytest.raises(FieldError, match="not a full set"):
        external_field_at(bad, 0, 0, 0, np.datetime64("2024-01-01"))
    only_internal = pd.DataFrame({"time": ["2024-01-01"], "g10": [1.0], "g11": [0.0], "h11": [0.0]})
    with pytest.raises(FieldError, match="no external"):
        external_field_at(only_internal, 0, 0, 0, np.datetime64("2024-01-01"))


def test_nearest_station_and_caution():
    i, dist = nearest_station([90.0, 10.0], [0.0, 50.0], 0.0, 0.0)
    # a quarter of a great circle: pi / 2 x 6371.2 km (spherical geometry) for station 0,
    # station 1 is nearer
    assert i == 1
    _, quarter = nearest_station([90.0], [0.0], 0.0, 0.0)
    assert quarter == pytest.approx(np.pi / 2 * 6371.2)
    stations = pd.DataFrame({"station": ["AAA", "BBB"], "longitude": [90.0, 10.0], "latitude": [0.0, 50.0]})
    text = remote_reference_caution(stations, 10.0, 45.0)
    assert "BBB" in text and "556 km" in text and "-5.0 deg" in text and "\n" not in text


# ----------------------------------------------------------------------------------------------
# plane and regional
# ----------------------------------------------------------------------------------------------
E = np.arange(-2000.0, 2001.0, 100.0)
EE, NN = np.meshgrid(E, E)


def _grid(values, name="g"):
    return make_grid(E, E, values, name=name, units="nT", long_name=name)


def test_vector_parts_add_up_to_the_data_and_masks_are_kept():
    rng = np.random.default_rng(1)
    comps = [rng.normal(0, 5, EE.shape) + 10 * np.sin(EE / 700.0 + k) for k in range(3)]
    comps[2][:3, :4] = np.nan
    parts = separate_vector_plane(*(_grid(c, n) for c, n in zip(comps, ("n", "e", "d"))))
    for k, comp in enumerate(("north", "east", "down")):
        total = parts[f"internal_{comp}"].values + parts[f"external_{comp}"].values
        mask = np.isnan(comps[2])
        assert np.all(np.isnan(total[mask]))
        # the split is linear and complete: the parts add up to the data (algebra)
        np.testing.assert_allclose(total[~mask], comps[k][~mask], atol=1e-9)
    # a uniform field added to the data goes wholly to the side named by `uniform`
    base = separate_vector_plane(*(_grid(c, n) for c, n in zip(comps, ("n", "e", "d"))), uniform="internal")
    shifted = separate_vector_plane(
        *(_grid(c + 100.0, n) for c, n in zip(comps, ("n", "e", "d"))), uniform="internal"
    )
    np.testing.assert_allclose(shifted["external_down"].values, base["external_down"].values, atol=1e-9)
    diff = shifted["internal_down"].values - base["internal_down"].values
    assert np.nanmax(np.abs(diff - 100.0)) < 1e-9


def test_plane_input_errors():
    a = _grid(np.zeros(EE.shape))
    other = make_grid(E + 50.0, E, np.zeros(EE.shape), name="x", units="nT", long_name="x")
    with pytest.raises(FieldError, match="not on the same cells"):
        separate_vector_plane(a, other, a)
    with pytest.raises(FieldError, match="uniform part"):
        separate_vector_plane(a, a, a, uniform="both")
    with pytest.raises(FieldError, match="trend"):
        separate_vector_plane(a, a, a, trend="cubic")
    with pytest.raises(FieldError, match="no cell"):
        separate_vector_plane(_grid(np.full(EE.shape, np.nan)), a, a)
    with pytest.raises(FieldError, match="must be > 0"):
        separate_two_heights(a, a, 0.0)


def test_two_heights_of_a_field_from_below_is_internal():
    # g_z of a point mass 400 m below, z / r^3 (harmonic; Blakely 1995, Potential Theory in
    # Gravity and Magnetic Applications, CUP): compact, so the window holds it.
    def gz(up):
        z = up + 400.0
        return 1e8 * z / (EE**2 + NN**2 + z**2) ** 1.5

    inner = (slice(5, -5), slice(5, -5))
    # unregularised: wholly internal to 1 % of the peak (measured 0.15 %), after the mean a
    # plane cannot attribute; with the default regularisation the longest wavelengths go to
    # the external side: 5 % (measured 2.3 %)
    for reg, bound in ((0.0, 0.01), (0.1, 0.05)):
        internal, external = separate_two_heights(_grid(gz(0.0)), _grid(gz(50.0)), 50.0, regularisation=reg)
        err = internal.values - gz(0.0)
        assert np.abs(err - err[inner].mean())[inner].max() < bound * gz(0.0).max()
        assert np.all(np.isfinite(internal.values))
        np.testing.assert_allclose(internal.values + external.values, gz(0.0), atol=1e-9)


def test_regional_upward_parts_add_up_and_bad_height():
    values = 50 * np.exp(-(EE**2 + NN**2) / 800.0**2)
    grid = _grid(values, "anomaly")
    regional, residual = regional_upward(grid, 500.0)
    np.testing.assert_allclose(regional.values + residual.values, values, atol=1e-9)
    assert regional.name == "regional_upward" and residual.name == "residual_upward"
    assert regional.values.max() < values.max()  # continuation attenuates (Blakely 1995 ch. 12)
    with pytest.raises(FieldError, match="regional height"):
        regional_upward(grid, 0.0)


def test_two_layer_checks_and_damping_rule():
    with pytest.raises(FieldError, match="deep > shallow"):
        fit_two_layer(
            (EE, NN, np.zeros_like(EE)),
            np.ones_like(EE),
            deep_depth=100.0,
            shallow_depth=200.0,
            crossover_wavelength=1000.0,
        )
    with pytest.raises(FieldError, match="finite data"):
        fit_two_layer(
            (EE[:1, :5], NN[:1, :5], np.zeros((1, 5))),
            np.ones((1, 5)),
            deep_depth=1000.0,
            shallow_depth=200.0,
            crossover_wavelength=1000.0,
        )
    # the rule: deep fraction 1 / (1 + exp(2 k (h_d - h_s)) / rho) is 1/2 at the crossover
    deep_d, shallow_d = two_layer_dampings(4000.0, 2000.0, 300.0, 1000.0, 100.0)
    rho = shallow_d * (100.0 / 300.0) ** 2 / (deep_d * (1000.0 / 2000.0) ** 2)
    k = 2 * np.pi / 4000.0
    assert 1.0 / (1.0 + np.exp(2 * k * 1700.0) / rho) == pytest.approx(0.5)
