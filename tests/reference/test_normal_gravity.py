"""Normal gravity (potfield.fields.gravity.reductions.normal_gravity) against published values and boule."""

from __future__ import annotations

import boule
import numpy as np
import pytest

from potfield.errors import ConfigError
from potfield.fields.errors import BadParameter
from potfield.fields.gravity.reductions import normal_gravity

LATS = np.linspace(-90.0, 90.0, 37)


@pytest.mark.parametrize("name, ref", [("WGS84", boule.WGS84), ("GRS80", boule.GRS80)])
def test_closed_form_matches_boule_on_and_above_the_ellipsoid(name, ref):
    lat, h = np.meshgrid(LATS, [0.0, 10.0, 500.0, 2_000.0, 8_848.0, 40_000.0])
    ours = normal_gravity(lat, h, name)
    # reference library: boule 0.6, Ellipsoid.normal_gravity, exact closed form at height
    # (Li and Goetze 2001, Geophysics 66:1660); brief asks 0.001 mGal
    theirs = ref.normal_gravity((None, lat, h))
    np.testing.assert_allclose(ours, theirs, rtol=0, atol=1e-3)
    assert ours.shape == lat.shape


def test_wgs84_equatorial_and_polar_gravity_nima_tr8350():
    # NIMA TR8350.2 (2000), Table 3.4: gamma_e = 9.7803253359, gamma_p = 9.8321849378 m/s^2
    assert normal_gravity(0.0, 0.0, "WGS84") == pytest.approx(978032.53359, abs=1e-4)
    assert normal_gravity(90.0, 0.0, "WGS84") == pytest.approx(983218.49378, abs=1e-4)
    assert normal_gravity(-90.0, 0.0, "WGS84") == pytest.approx(983218.49378, abs=1e-4)


@pytest.mark.parametrize(
    "name, values",
    [
        # references.md, recomputed from the defining constants (Moritz 1980, GRS80 / NIMA WGS84),
        # given to 4 decimals, so 1e-4 mGal
        ("GRS80", (978032.6772, 980619.9203, 983218.6369)),
        ("WGS84", (978032.5336, 980619.7769, 983218.4938)),
    ],
)
def test_check_values_at_0_45_90_degrees(name, values):
    np.testing.assert_allclose(normal_gravity([0.0, 45.0, 90.0], 0.0, name), values, rtol=0, atol=1e-4)


def test_somigliana_on_the_grs80_ellipsoid():
    # Somigliana with the GRS80 constants of Hinze et al. (2005), Geophysics 70(4) J25, eq. 2:
    # gamma_e = 978032.67715 mGal, k = 0.001931851353, e2 = 0.0066943800229
    s2 = np.sin(np.radians(LATS)) ** 2
    somigliana = 978032.67715 * (1 + 0.001931851353 * s2) / np.sqrt(1 - 0.0066943800229 * s2)
    np.testing.assert_allclose(normal_gravity(LATS, 0.0, "GRS80"), somigliana, rtol=0, atol=1e-4)


def test_vertical_gradient_near_the_ellipsoid():
    # the free-air gradient on the GRS80 ellipsoid: 0.3087691 - 0.0004398 sin^2(phi) mGal/m
    # (Hinze et al. 2005, eq. 4; a first-order series in f, good to ~2e-5 mGal/m)
    lat = np.array([0.0, 30.0, 60.0, 90.0])
    gradient = (normal_gravity(lat, 1.0, "GRS80") - normal_gravity(lat, 0.0, "GRS80")) / 1.0
    expected = -(0.3087691 - 0.0004398 * np.sin(np.radians(lat)) ** 2)
    np.testing.assert_allclose(gradient, expected, rtol=0, atol=3e-5)


def test_equator_is_weaker_than_pole_and_gravity_decreases_upward():
    # common practice: gravity increases poleward and decreases with height
    g = normal_gravity(LATS[LATS >= 0], 0.0)
    assert np.all(np.diff(g) > 0)
    assert np.all(np.diff(normal_gravity(45.0, np.array([0.0, 100.0, 1000.0]))) < 0)


def test_unknown_ellipsoid_is_a_one_line_config_error():
    # the physics names the ellipsoids it knows; the reference stage adds the config key
    from potfield.stages._boundary import translate

    with pytest.raises(BadParameter) as info:
        normal_gravity(10.0, 0.0, "Clarke1866")
    message = str(info.value)
    assert "Clarke1866" in message and "WGS84" in message and "\n" not in message
    assert "reference" not in message
    with pytest.raises(ConfigError) as info, translate(ConfigError, key="reference.ellipsoid"):
        normal_gravity(10.0, 0.0, "Clarke1866")
    assert "reference.ellipsoid" in str(info.value) and "WGS84" in str(info.value)
    # names are case-insensitive
    assert normal_gravity(0.0, 0.0, "wgs84") == normal_gravity(0.0, 0.0, "WGS84")
