"""Free-air, atmospheric and Bouguer (slab and spherical cap) reductions against published
formulas and check values, and against a direct numerical integration of the cap."""

from __future__ import annotations

import boule
import numpy as np
import pytest
from scipy import integrate

from potfield.fields.gravity.reductions import (
    G,
    atmospheric_correction,
    bouguer_cap,
    bouguer_slab,
    free_air_correction,
)


def test_first_order_free_air_gradient():
    # 0.3086 mGal/m (common practice; Hinze et al. 2005 "traditional")
    np.testing.assert_allclose(free_air_correction([0.0, 1.0, 1000.0]), [0.0, 0.3086, 308.6])


def test_second_order_height_correction_check_value():
    # Hinze et al. (2005) Geophysics 70(4):J25, eq. 4: -308.697 mGal at 1000 m on the equator;
    # our correction is what is ADDED to observed gravity, i.e. minus that
    assert free_air_correction(1000.0, 0.0, order=2) == pytest.approx(308.697, abs=5e-4)
    assert free_air_correction(1000.0, 90.0, order=2) == pytest.approx(
        0.3087691e3 - 0.4398 - 7.2125e-2, abs=1e-9
    )


def test_second_order_formula_follows_the_exact_normal_gravity():
    # reference library: boule 0.6 GRS80 closed form; the Hinze et al. (2005) formula is a
    # truncated series: agreement to a few hundredths of a mGal below 5 km (measured 0.044)
    lat = np.linspace(0, 90, 10)
    for h in (100.0, 1000.0, 5000.0):
        exact = boule.GRS80.normal_gravity((None, lat, np.zeros_like(lat))) - boule.GRS80.normal_gravity(
            (None, lat, np.full_like(lat, h))
        )
        np.testing.assert_allclose(free_air_correction(h, lat, order=2), exact, rtol=0, atol=1e-5 * h + 1e-3)


def test_second_order_needs_latitude_and_order_is_checked():
    with pytest.raises(ValueError):
        free_air_correction(100.0, order=2)
    with pytest.raises(ValueError):
        free_air_correction(100.0, 0.0, order=3)


def test_atmospheric_correction_check_values():
    # Hinze et al. (2005) eq. 5: 0.874 at 0 m, 0.77856 at 1000 m, 0.60904 at 3000 m
    np.testing.assert_allclose(
        atmospheric_correction([0.0, 1000.0, 3000.0]), [0.874, 0.77856, 0.60904], rtol=0, atol=1e-9
    )


def test_bouguer_slab_check_values():
    # Hinze et al. (2005): 2 pi G rho = 0.04193 mGal/m per 1000 kg/m^3 with G = 6.6743e-11
    # (CODATA 2018), 0.1119 mGal/m at 2670 kg/m^3
    assert G == 6.6743e-11
    # (the published 0.04193 is 0.0419359 truncated, so 1e-5)
    assert bouguer_slab(1.0, 1000.0) == pytest.approx(0.04193, abs=1e-5)
    assert bouguer_slab(1.0, 2670.0) == pytest.approx(0.1119, abs=1e-4)  # 0.11197 truncated
    # linear in h, signed (a slab of missing mass below the datum is negative)
    np.testing.assert_allclose(
        bouguer_slab([-10.0, 0.0, 1000.0], 2670.0),
        np.array([-10.0, 0.0, 1000.0]) * 2 * np.pi * G * 2670.0 * 1e5,
        rtol=1e-14,
    )


def _lafehr_bullard_b(h, rho=2670.0):
    """Curvature (Bullard B) term, cap minus slab, LaFehr (1991) Geophysics 56:1179, as
    written in Hinze et al. (2005) eq. 7 (coefficients written out from memory; the test below
    also compares with an independent numerical integration)."""
    r0, s = 6_371_000.0, 166_735.0
    a = s / r0
    big_r = r0 + h
    eta, delta = h / big_r, r0 / big_r
    mu = eta**2 / 3 - eta
    d = 3 * np.cos(a) ** 2 - 2
    f = np.cos(a)
    k = np.sin(a) ** 2
    p = -6 * np.cos(a) ** 2 * np.sin(a / 2) + 4 * np.sin(a / 2) ** 3
    m = -3 * np.sin(a) ** 2 * np.cos(a)
    n = 2 * (np.sin(a / 2) - np.sin(a / 2) ** 2)
    root = np.sqrt((f - delta) ** 2 + k)
    lam = ((d + f * delta + delta**2) * root + p + m * np.log(n / (f - delta + root))) / 3
    return 2 * np.pi * G * rho * (mu * h - lam * big_r) * 1e5


def test_bouguer_cap_curvature_term_matches_lafehr_1991():
    h = np.array([10.0, 500.0, 1000.0, 1500.0, 2000.0, 3000.0, 5000.0])
    curvature = bouguer_cap(h) - bouguer_slab(h)
    # LaFehr (1991) closed form (Hinze et al. 2005 eq. 7)
    np.testing.assert_allclose(curvature, _lafehr_bullard_b(h), rtol=0, atol=1e-6)
    # references.md / Hinze et al. (2005): the curvature term is about +1.5 mGal at 1500 m
    assert curvature[3] == pytest.approx(1.5, abs=0.15)
    # LaFehr (1991): the term changes sign at high elevation (about 4 km; from memory)
    assert curvature[-1] < 0 < curvature[2]


def test_bouguer_cap_against_direct_numerical_integration():
    # Newton's integral over a spherical shell segment (radius R0 .. R0+h, angle <= S/R0),
    # vertical attraction at the top centre, integrated numerically in (r, psi): independent
    # of the closed-form angle integral used in potfield. Inner integral: Gauss-Legendre on
    # geometrically growing panels (the integrand peaks at psi ~ (r_p - r)/r_p); outer:
    # adaptive quadrature (scipy), which copes with the log behaviour at r -> r_p.
    r0, alpha, rho, h = 6_371_000.0, 166_735.0 / 6_371_000.0, 2670.0, 1500.0
    rp = r0 + h
    nodes, weights = np.polynomial.legendre.leggauss(16)

    def inner(r):
        gap = rp - r
        edges = np.concatenate([[0.0], np.geomspace(max(gap, 1e-3) / rp * 1e-3, alpha, 80)])
        a, b = edges[:-1, None], edges[1:, None]
        psi = 0.5 * (a + b) + 0.5 * (b - a) * nodes
        w = 0.5 * (b - a) * weights
        half = np.sin(0.5 * psi) ** 2
        ell2 = gap * gap + 4.0 * rp * r * half  # stable form of rp^2 + r^2 - 2 rp r cos(psi)
        vertical = gap + 2.0 * r * half  # rp - r cos(psi)
        return np.sum(w * r * r * np.sin(psi) * vertical / ell2**1.5)

    value = integrate.quad(inner, r0, rp, limit=200, epsabs=0, epsrel=1e-10)[0]
    direct = 2 * np.pi * G * rho * value * 1e5
    assert bouguer_cap(h, rho) == pytest.approx(direct, abs=1e-4)
    # and the difference from the slab is the curvature term, not rounding
    assert abs(direct - bouguer_slab(h, rho)) > 1.0


def test_bouguer_cap_limits():
    # no thickness, no attraction
    assert bouguer_cap(0.0) == 0.0
    # whole-sphere shell: G M_shell / r_p^2 (Newton's shell theorem)
    r0, h, rho = 6_371_000.0, 1000.0, 2670.0
    rp = r0 + h
    shell = G * rho * 4 / 3 * np.pi * (rp**3 - r0**3) / rp**2 * 1e5
    assert bouguer_cap(h, rho, arc_length=np.pi * r0) == pytest.approx(shell, rel=1e-10)
    # below the datum the shell is above the station: negative like 2 pi G rho h
    assert bouguer_cap(-300.0) == pytest.approx(bouguer_slab(-300.0), abs=0.5)
    assert bouguer_cap(-300.0) < 0
    # a shell entirely above a point inside it attracts nothing (shell theorem)
    assert bouguer_cap(-1000.0, arc_length=np.pi * r0) == pytest.approx(0.0, abs=1e-8)
    # vectorised, density scales linearly
    hs = np.array([[100.0, 200.0], [300.0, 400.0]])
    assert bouguer_cap(hs).shape == (2, 2)
    np.testing.assert_allclose(bouguer_cap(hs, 1000.0) * 2.67, bouguer_cap(hs, 2670.0))
