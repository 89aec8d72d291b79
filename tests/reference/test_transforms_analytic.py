"""Transforms checked against analytic fields and an independent reference library.

Sources: Blakely (1995) Potential Theory in Gravity and Magnetic Applications, CUP (point mass
g_z = G m z / r^3; wavenumber filters, ch. 12); harmonica 0.7 (PyPI) ``point_gravity`` and
``dipole_magnetic`` forward models; Nabighian (1972) Geophysics 37:507 (analytic signal of a 2-D
contact); Salem et al. (2007) The Leading Edge 26:1502 (tilt of a contact = atan(x/h));
MacLeod, Jones and Dai (1993) Explor. Geophys. 24:679 (pseudo-inclination RTP).
"""

from __future__ import annotations

import warnings

import harmonica as hm
import numpy as np
import pytest

from potfield.fields.harmonic import transforms as tf
from potfield.io.grids import make_grid

G = 6.6743e-11  # CODATA 2018
SI_TO_MGAL = 1e5
INNER = (slice(30, -30), slice(30, -30))  # "away from the edges": 30 cells in from each side


# --------------------------------------------------------------------------------------------
# point mass
# --------------------------------------------------------------------------------------------
PM_E = np.arange(-6000.0, 6001.0, 100.0)
PM_N = np.arange(-5000.0, 5001.0, 100.0)
PM_EE, PM_NN = np.meshgrid(PM_E, PM_N)
PM_MASS, PM_DEPTH = 1e11, 1000.0


def _point_gz(height):
    """g_z (mGal) of a point mass at depth PM_DEPTH, observed at ``height``: G m z / r^3."""
    z = height + PM_DEPTH
    r = np.sqrt(PM_EE**2 + PM_NN**2 + z**2)
    return G * PM_MASS * z / r**3 * SI_TO_MGAL


def _point_grid(height=0.0):
    return make_grid(PM_E, PM_N, _point_gz(height), name="g", units="mGal", long_name="g_z")


def _rel_max(result, truth):
    return np.abs(result - truth)[INNER].max() / np.abs(truth).max()


def test_point_mass_upward_continuation_matches_analytic():
    up = tf.upward_continuation(_point_grid(0.0), 300.0)
    truth = _point_gz(300.0)
    # Blakely (1995) point-mass g_z = G m z / r^3 evaluated at the higher level:
    # within 1 % of the peak away from the edges (measured 0.32 %).
    assert _rel_max(up.values, truth) < 0.01
    # harmonica.point_gravity as independent reference library (same field).
    ref = hm.point_gravity(
        (PM_EE, PM_NN, np.full_like(PM_EE, 300.0)), (0.0, 0.0, -PM_DEPTH), PM_MASS, field="g_z"
    )
    assert _rel_max(up.values, ref) < 0.01


def test_point_mass_vertical_derivatives_match_analytic_and_harmonica():
    grid = _point_grid(0.0)
    h = PM_DEPTH
    rho2 = PM_EE**2 + PM_NN**2
    r = np.sqrt(rho2 + h**2)
    # d g_z / dz (z down) of G m h / r^3 = G m (2 h^2 - rho^2) / r^5 (derived from Blakely 1995).
    dz1_true = G * PM_MASS * (2 * h**2 - rho2) / r**5 * SI_TO_MGAL
    dz2_true = 3 * G * PM_MASS * h * (2 * h**2 - 3 * rho2) / r**7 * SI_TO_MGAL
    dz1 = tf.vertical_derivative(grid, 1)
    dz2 = tf.vertical_derivative(grid, 2)
    assert dz1.attrs["units"] == "mGal/m"
    assert _rel_max(dz1.values, dz1_true) < 0.01  # measured 0.32 % of peak
    assert _rel_max(dz2.values, dz2_true) < 0.01  # measured 0.002 % of peak
    # harmonica.point_gravity g_zz (Eotvos = 1e-4 mGal/m): independent reference library.
    gzz = (
        hm.point_gravity((PM_EE, PM_NN, np.zeros_like(PM_EE)), (0.0, 0.0, -PM_DEPTH), PM_MASS, field="g_zz")
        * 1e-4
    )
    assert _rel_max(dz1.values, gzz) < 0.01
    # positive above the source: z-down convention of Blakely (1995) ch. 12
    assert dz1.values[PM_N.size // 2, PM_E.size // 2] > 0


def test_point_mass_downward_continuation_recovers_lower_level():
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # 300 m of a 1300 m source depth: no warning expected
        down = tf.downward_continuation(_point_grid(300.0), 300.0, source_depth=1300.0)
    # Analytic G m z / r^3 at the lower level (Blakely 1995): within 1 % of the peak with the
    # automatic Tikhonov alpha (peak gain 100; measured 0.19 %).
    assert _rel_max(down.values, _point_gz(0.0)) < 0.01
    assert down.attrs["regularisation_m2"] > 0
    assert down.attrs["peak_gain"] == pytest.approx(100.0, rel=1e-3)


def test_downward_continuation_warns_near_the_source():
    with pytest.warns(UserWarning, match="source depth"):
        down = tf.downward_continuation(_point_grid(300.0), 1200.0, source_depth=1300.0)
    assert "source depth" in down.attrs["warning"]


# --------------------------------------------------------------------------------------------
# dipole total-field anomaly (harmonica.dipole_magnetic as reference library)
# --------------------------------------------------------------------------------------------
DP_E = np.arange(-6400.0, 6401.0, 50.0)
DP_N = np.arange(-6000.0, 6001.0, 50.0)
DP_EE, DP_NN = np.meshgrid(DP_E, DP_N)
DP_DEPTH, DP_MOMENT = 500.0, 1e9


def _tfa(inc, dec, height=0.0, east=0.0, north=0.0):
    """Total-field anomaly (nT) of an induced dipole: B . F_hat (harmonica.dipole_magnetic)."""
    moment = hm.magnetic_angles_to_vec(DP_MOMENT, inc, dec)
    be, bn, bu = hm.dipole_magnetic(
        (DP_EE, DP_NN, np.full_like(DP_EE, height)), (east, north, -DP_DEPTH), moment, field="b"
    )
    fe, fn, fu = hm.magnetic_angles_to_vec(1.0, inc, dec)
    return be * fe + bn * fn + bu * fu


def _tfa_grid(inc, dec):
    return make_grid(DP_E, DP_N, _tfa(inc, dec), name="anomaly", units="nT", long_name="total-field anomaly")


@pytest.fixture(scope="module")
def dipole_50():
    return _tfa_grid(50.0, 5.0)


def test_dipole_upward_continuation(dipole_50):
    up = tf.upward_continuation(dipole_50, 200.0)
    # harmonica.dipole_magnetic at 200 m: within 0.5 % of the peak (measured 0.02 %)
    assert _rel_max(up.values, _tfa(50.0, 5.0, 200.0)) < 0.005


def test_dipole_vertical_derivatives(dipole_50):
    # Reference: central differences of harmonica.dipole_magnetic in height (z down):
    # step 1 m (first) and 5 m (second), truncation errors far below the tolerance.
    ref1 = (_tfa(50.0, 5.0, -1.0) - _tfa(50.0, 5.0, 1.0)) / 2.0
    ref2 = (_tfa(50.0, 5.0, -5.0) - 2 * dipole_50.values + _tfa(50.0, 5.0, 5.0)) / 25.0
    assert _rel_max(tf.vertical_derivative(dipole_50, 1).values, ref1) < 0.005  # measured 0.005 %
    assert _rel_max(tf.vertical_derivative(dipole_50, 2).values, ref2) < 0.01  # measured 0.03 %


@pytest.mark.parametrize("method, tol", [("central", 0.005), ("fft", 0.001)])
def test_dipole_horizontal_derivatives(dipole_50, method, tol):
    # Reference: harmonica.dipole_magnetic with the dipole shifted by +-1 m (d/dx f(x - x0) = -d/dx0).
    ref_dx = (_tfa(50.0, 5.0, east=-1.0) - _tfa(50.0, 5.0, east=1.0)) / 2.0
    ref_dy = (_tfa(50.0, 5.0, north=-1.0) - _tfa(50.0, 5.0, north=1.0)) / 2.0
    dx, dy = tf.horizontal_derivatives(dipole_50, method)
    # within 0.5 % (central, fourth order; measured 0.16 %) / 0.1 % (fft; measured 0.001 %)
    # of the peak away from the edges
    assert _rel_max(dx.values, ref_dx) < tol
    assert _rel_max(dy.values, ref_dy) < tol


@pytest.mark.parametrize("inc, dec", [(60.0, 10.0), (45.0, -20.0), (30.0, 30.0), (-50.0, 15.0)])
def test_reduction_to_pole_matches_anomaly_at_the_pole(inc, dec):
    pole = _tfa(90.0, 0.0)
    rtp = tf.reduction_to_pole(_tfa_grid(inc, dec), inc, dec, method="plain")
    err = (rtp.values - pole)[INNER]
    rel_rms = np.sqrt(np.mean(err**2) / np.mean(pole[INNER] ** 2))
    # Baranov (1957) RTP of an induced dipole equals the same dipole's anomaly at I = 90
    # (harmonica.dipole_magnetic): relative RMS < 5 % (measured 1.3-2.7 %), max error < 1 % of
    # the peak (measured 0.09-0.17 %; I = -50: 1.9 % and 0.12 %).
    assert rel_rms < 0.05
    assert np.abs(err).max() / np.abs(pole).max() < 0.01
    assert rtp.attrs["rtp_method"] == "plain"


def test_reduction_to_pole_with_remanent_magnetisation():
    # A dipole magnetised along (I_m, D_m) = (-30, 140) in a field (I, D) = (55, 5): the RTP with
    # both directions equals the vertically magnetised dipole's anomaly at the pole (Blakely 1995
    # ch. 12; forward fields from harmonica.dipole_magnetic).
    inc, dec, m_inc, m_dec = 55.0, 5.0, -30.0, 140.0
    moment = hm.magnetic_angles_to_vec(DP_MOMENT, m_inc, m_dec)
    b = hm.dipole_magnetic((DP_EE, DP_NN, np.zeros_like(DP_EE)), (0.0, 0.0, -DP_DEPTH), moment, field="b")
    f = hm.magnetic_angles_to_vec(1.0, inc, dec)
    tfa = make_grid(
        DP_E,
        DP_N,
        sum(bi * fi for bi, fi in zip(b, f)),
        name="anomaly",
        units="nT",
        long_name="total-field anomaly",
    )
    rtp = tf.reduction_to_pole(tfa, inc, dec, mag_inclination=m_inc, mag_declination=m_dec)
    pole = _tfa(90.0, 0.0)
    # within 1 % of the peak away from the edges (measured 0.14 %)
    assert np.abs(rtp.values - pole)[INNER].max() / np.abs(pole).max() < 0.01


def test_reduction_to_pole_is_the_same_on_descending_northing():
    # The pitfall of references.md: an FFT on descending northing flips N-S. D = -20 deg makes
    # the anomaly asymmetric, so a flip would show against the pole anomaly (harmonica).
    inc, dec = 45.0, -20.0
    grid = _tfa_grid(inc, dec).isel(northing=slice(None, None, -1))
    assert grid.northing.values[0] > grid.northing.values[-1]
    rtp = tf.reduction_to_pole(grid, inc, dec)
    assert rtp.northing.values[0] > rtp.northing.values[-1]  # returned in the input's order
    rtp = rtp.sortby("northing")
    pole = _tfa(90.0, 0.0)
    assert np.abs(rtp.values - pole)[INNER].max() / np.abs(pole).max() < 0.01


@pytest.mark.parametrize("dec", [0.0, 25.0])
def test_pseudo_inclination_rtp_at_low_latitude_stays_bounded(dec):
    inc = 10.0
    pole = _tfa(90.0, 0.0)
    rtp = tf.reduction_to_pole(_tfa_grid(inc, dec), inc, dec, method="pseudo")
    assert rtp.attrs["rtp_method"] == "pseudo"
    assert rtp.attrs["pseudo_inclination"] == pytest.approx(30.0)
    ratio = np.abs(rtp.values).max() / np.abs(pole).max()
    # MacLeod et al. (1993): the amplitude term at a steeper inclination keeps the result
    # bounded; its peak stays within a factor 2 of the true pole anomaly's (measured 0.71).
    assert 0.5 < ratio < 2.0
    # ... and the peak stays over the dipole (within 2 cells = 100 m): no stripe dominates.
    iy, ix = np.unravel_index(np.argmax(rtp.values), rtp.shape)
    assert abs(DP_E[ix]) <= 100.0 and abs(DP_N[iy]) <= 100.0


def test_pseudo_inclination_limits_noise_amplification():
    # Baranov filter amplitude 1/|Theta|^2 -> 1/sin^2 I perpendicular to D (Blakely 1995 ch. 12;
    # references.md); the pseudo filter's amplitude is at most 1/sin^2 I' (MacLeod et al. 1993).
    rng = np.random.default_rng(7)
    noise = make_grid(
        DP_E[:128],
        DP_N[:128],
        rng.normal(0.0, 1.0, (128, 128)),
        name="anomaly",
        units="nT",
        long_name="noise",
    )
    plain = tf.reduction_to_pole(noise, 10.0, 0.0, method="plain")
    pseudo = tf.reduction_to_pole(noise, 10.0, 0.0, method="pseudo")
    bound = 1.0 / np.sin(np.radians(30.0)) ** 2  # = 4, the pseudo filter's largest gain
    assert np.std(pseudo.values) < bound * np.std(noise.values)
    # plain: stripes of amplified noise (measured std 9.3 vs 2.2 for pseudo)
    assert np.std(plain.values) > 2.0 * np.std(pseudo.values)


# --------------------------------------------------------------------------------------------
# 2-D contact: analytic signal and tilt (Nabighian 1972; Salem et al. 2007)
# --------------------------------------------------------------------------------------------
CT_E = np.arange(-12000.0, 12001.0, 50.0)
# A wide strip in northing too: a 2-D structure needs the grid to be long along strike, else the
# taper makes it a finite (3-D) body.
CT_N = np.arange(-12000.0, 12001.0, 200.0)
CT_H, CT_X0, CT_ALPHA = 400.0, 250.0, 100.0


def _contact(beta_deg):
    """Field of a 2-D contact at x0, top depth h (Nabighian 1972): its x-derivative is
    alpha (h cos b - x sin b) / (h^2 + x^2), integrated:
    alpha [cos b atan(x / h) - sin b ln(h^2 + x^2) / 2]."""
    b = np.radians(beta_deg)
    x = CT_E - CT_X0
    row = CT_ALPHA * (np.cos(b) * np.arctan2(x, CT_H) - np.sin(b) * 0.5 * np.log(CT_H**2 + x**2))
    values = np.broadcast_to(row, (CT_N.size, CT_E.size))
    return make_grid(CT_E, CT_N, values, name="anomaly", units="nT", long_name="contact")


@pytest.mark.parametrize("beta, tol", [(0.0, 0.03), (60.0, 0.05)])
def test_total_gradient_amplitude_of_contact_peaks_over_it(beta, tol):
    tga = tf.total_gradient_amplitude(_contact(beta))
    row = tga.values[CT_N.size // 2]
    # Nabighian (1972): |A(x)| = alpha / sqrt(h^2 + (x - x0)^2), a bell over the contact
    # whatever the magnetisation direction (beta).
    assert CT_E[np.argmax(row)] == pytest.approx(CT_X0, abs=50.0)
    truth = CT_ALPHA / np.sqrt(CT_H**2 + (CT_E - CT_X0) ** 2)
    near = np.abs(CT_E - CT_X0) < 2000.0
    # within 3 % (beta 0; measured 1.1 %) / 5 % (beta 60; measured 3.3 %) of the peak
    # (truncation of the 1/x tails of the 24 km profile)
    assert np.abs(row - truth)[near].max() / truth.max() < tol


def test_tilt_of_contact_is_atan_x_over_h_and_bounded():
    tilt = tf.tilt_angle(_contact(0.0))
    assert tilt.attrs["units"] == "degree"
    row = tilt.values[CT_N.size // 2]
    near = np.abs(CT_E - CT_X0) < 2000.0
    # Salem et al. (2007): tilt of a vertical contact = atan((x - x0) / h); within 2 degrees
    # (measured 0.65 degree on this profile).
    assert np.abs(row - np.degrees(np.arctan((CT_E - CT_X0) / CT_H)))[near].max() < 2.0
    # Miller and Singh (1994): the tilt is an angle in [-90, 90] degrees.
    assert np.nanmax(np.abs(tilt.values)) <= 90.0


def test_tilt_of_dipole_is_bounded_and_positive_over_it():
    pole = make_grid(DP_E, DP_N, _tfa(90.0, 0.0), name="anomaly", units="nT", long_name="tfa")
    tilt = tf.tilt_angle(pole)
    # Miller and Singh (1994): within +-90 degrees, positive over the source, negative outside.
    assert np.abs(tilt.values).max() <= 90.0
    assert tilt.values[DP_N.size // 2, DP_E.size // 2] > 80.0
    assert tilt.values[DP_N.size // 2, DP_E.size // 2 + 30] < 0.0  # 1500 m off the source
    # Roest et al. (1992): the total gradient amplitude of a pole dipole peaks above it.
    tga = tf.total_gradient_amplitude(pole)
    iy, ix = np.unravel_index(np.argmax(tga.values), tga.shape)
    assert (DP_E[ix], DP_N[iy]) == (0.0, 0.0)
