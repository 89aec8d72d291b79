"""Earth tide (potfield.fields.gravity.tides, Longman 1959) against the tidegravity reference library and
physical checks.

pygtide (a wrapper of ETERNA PREDICT) would be a second, independent tide program, but it does
not build here (it needs a Fortran compiler), so it is not used.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from potfield.fields.errors import OutOfModelRange
from potfield.fields.gravity.tides import longman_components, longman_correction, longman_gravity

tidegravity = pytest.importorskip("tidegravity")

#: tidegravity uses G = 6.673e-8 cgs; potfield CODATA 2018 G = 6.6743e-8: results scale by it.
G_RATIO = 6.6743 / 6.673


def _times(start, periods, freq):
    return pd.date_range(start, periods=periods, freq=freq)


def _tidegravity_total(lon, lat, height, times):
    """tidegravity's Longman total (upward acceleration x 1.1575, mGal): the correction."""
    n = times.size
    _, _, g0 = tidegravity.solve_longman_tide(
        np.full(n, float(lat)),
        np.full(n, float(lon)),
        np.full(n, float(height)),
        np.array(times.to_pydatetime()),
    )
    return np.asarray(g0)


@pytest.mark.parametrize(
    "lon, lat, height", [(-122.7, 45.5, 50.0), (151.2, -33.9, 0.0), (24.9, 69.0, 1200.0), (0.0, 0.0, 0.0)]
)
def test_matches_tidegravity_over_a_month(lon, lat, height):
    times = _times("2021-03-01", 30 * 24 * 4, "15min")
    ours = longman_gravity(
        np.full(times.size, lon),
        np.full(times.size, lat),
        np.full(times.size, height),
        times.values,
        gravimetric_factor=1.1575,
    )
    # reference library: tidegravity (Longman 1959 formulas, factor 1 + h2 - 1.5 k2 = 1.1575).
    # Same formulas and constants except G, so after scaling G the two agree to rounding
    # (1e-9 mGal): tidegravity returns the correction (upward acceleration), we the tide the
    # gravimeter sees, which is its negative.
    theirs = _tidegravity_total(lon, lat, height, times) * G_RATIO
    np.testing.assert_allclose(ours, -theirs, rtol=0, atol=1e-9)
    np.testing.assert_allclose(
        longman_correction(lon, lat, height, times.values, gravimetric_factor=1.1575),
        theirs,
        rtol=0,
        atol=1e-9,
    )


def test_amplitude_bounds_over_a_month():
    times = _times("2024-01-01", 31 * 24 * 4, "15min").values
    for lat in (-60.0, -20.0, 0.0, 35.0, 70.0):
        tide = longman_gravity(10.0, lat, 0.0, times)
        # references.md / Longman (1959): about +-0.15 mGal typical, never above 0.35 mGal
        assert np.abs(tide).max() < 0.35
        # a month always has a range of at least ~0.1 mGal at these latitudes (common practice)
        assert np.ptp(tide) > 0.1


def test_dominant_period_is_m2_at_low_latitude():
    # two months of hourly values at 10 deg N: the largest spectral line is M2 (12.42 h), the
    # next semidiurnal one S2 (12.00 h); Moon/Sun about 2.2 (references.md; Doodson's M2/S2
    # coefficients 0.9081/0.4229 = 2.15, from memory)
    times = _times("2022-05-01", 59 * 24, "1h").values
    tide = longman_gravity(30.0, 10.0, 0.0, times)
    spectrum = np.abs(np.fft.rfft((tide - tide.mean()) * np.hanning(tide.size)))
    freq = np.fft.rfftfreq(tide.size, d=1.0)  # cycles per hour
    peak = np.argmax(spectrum[1:]) + 1
    assert 1.0 / freq[peak] == pytest.approx(12.42, abs=0.1)
    semi = (freq > 1 / 12.2) & (freq < 1 / 11.8)
    s2 = np.argmax(np.where(semi, spectrum, 0.0))
    assert 1.0 / freq[s2] == pytest.approx(12.00, abs=0.1)
    assert 1.6 < spectrum[peak] / spectrum[s2] < 2.8


def test_solar_term_sign_and_size_at_the_subsolar_point():
    # Newtonian tidal acceleration (upward, toward a body at the zenith): 2 G S r / D^3 with the
    # Sun overhead, -G S r / D^3 at the horizon (common practice; G S = 1.327e20 m^3/s^2,
    # D = 1.496e11 m, r = 6.378e6 m, from memory) -> +0.0505 and -0.0253 mGal.
    # Near the March equinox the Sun is overhead at 0 N, 0 E about 12:07 UTC (equation of time).
    noon = np.array(["2021-03-20T12:07"], dtype="datetime64[ns]")
    dawn = np.array(["2021-03-20T06:07"], dtype="datetime64[ns]")
    gs_noon = longman_components(0.0, 0.0, 0.0, noon)[1][0]
    gs_dawn = longman_components(0.0, 0.0, 0.0, dawn)[1][0]
    unit = 1.327e20 * 6.378e6 / 1.496e11**3 * 1e5
    assert gs_noon == pytest.approx(2 * unit, rel=0.03)
    assert gs_dawn == pytest.approx(-unit, rel=0.05)
    # the gravimeter reads less with the Sun overhead (positive upward pull): tide < 0 there
    # when the Moon's part is removed
    gm_noon = longman_components(0.0, 0.0, 0.0, noon)[0][0]
    assert longman_gravity(0.0, 0.0, 0.0, noon, 1.0)[0] == pytest.approx(-(gm_noon + gs_noon))


def test_vectorised_over_readings_and_broadcasts():
    rng = np.random.default_rng(3)
    n = 500
    times = np.datetime64("2023-07-01T00:00", "ns") + rng.integers(0, 86400 * 30, n).astype("timedelta64[s]")
    lon, lat, h = rng.uniform(-180, 180, n), rng.uniform(-80, 80, n), rng.uniform(0, 3000, n)
    all_at_once = longman_gravity(lon, lat, h, times)
    one_by_one = np.array(
        [longman_gravity(lon[i], lat[i], h[i], times[i : i + 1])[0] for i in range(0, n, 50)]
    )
    np.testing.assert_allclose(all_at_once[::50], one_by_one, rtol=0, atol=1e-15)
    # the gravimetric factor scales linearly
    np.testing.assert_allclose(longman_gravity(lon, lat, h, times, 2.32), 2 * all_at_once, rtol=1e-14)
    # 1 km of height changes the tide by about r/R = 0.016 % (Longman's r)
    low = longman_gravity(lon, lat, 0.0, times)
    high = longman_gravity(lon, lat, 1000.0, times)
    assert np.max(np.abs(high - low)) < 2e-4 * np.max(np.abs(low)) + 1e-9


def test_times_outside_the_valid_range_are_refused():
    with pytest.raises(OutOfModelRange) as info:
        longman_gravity(0.0, 0.0, 0.0, np.array(["1700-01-01"], dtype="datetime64[ns]"))
    assert "\n" not in str(info.value)
