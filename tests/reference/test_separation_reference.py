"""Separation of sources checked against outside references.

References used: chaosmagpy (spherical-harmonic synthesis, reference library), harmonica
(dipole and prism forward models, reference library), the Biot-Savart law for an infinite line
current (B = mu0 I / (2 pi r), written out here), the published Legendre functions (Chapman and
Bartels 1940), and the observatory demo's truth files.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import chaosmagpy.model_utils as cpm
import harmonica as hm
import numpy as np
import pandas as pd
import pytest
import scipy.fft

from potfield.fields.harmonic import spherical as sp
from potfield.fields.harmonic import transforms as tf
from potfield.fields.harmonic.separation import (
    fit_gauss_coefficients,
    fit_two_layer,
    induction_ratio,
    regional_upward,
    separate_two_heights,
    separate_vector_plane,
)
from potfield.fields.magnetic.igrf import geodetic_to_geocentric
from potfield.io.grids import make_grid

A_KM = 6371.2
ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "surveys" / "demo-observatory"


def _to_geodetic(br, bt, bp, latitude, height):
    """Geocentric (B_r, B_theta, B_phi) to geodetic north, east, down: X = X_s cos psi +
    Z_s sin psi, Z = -X_s sin psi + Z_s cos psi (Langel 1987; references.md)."""
    _, lat_c = geodetic_to_geocentric(latitude, height)
    psi = np.radians(np.asarray(latitude) - lat_c)
    xs, zs = -np.asarray(bt), -np.asarray(br)
    return xs * np.cos(psi) + zs * np.sin(psi), np.asarray(bp), -xs * np.sin(psi) + zs * np.cos(psi)


def _chaos_geodetic(coefs, lon, lat, h, source):
    """chaosmagpy synthesis at geodetic positions, rotated to the geodetic frame."""
    r, lat_c = geodetic_to_geocentric(lat, h)
    nmax = sp.degree_of(np.asarray(coefs).shape[-1])
    br, bt, bp = cpm.synth_values(coefs, r / 1000.0, 90.0 - lat_c, lon, nmax=nmax, source=source)
    return _to_geodetic(br, bt, bp, lat, h)


# ----------------------------------------------------------------------------------------------
# spherical synthesis
# ----------------------------------------------------------------------------------------------
def test_schmidt_legendre_closed_forms():
    theta = np.linspace(1.0, 179.0, 37)
    c, s = np.cos(np.radians(theta)), np.sin(np.radians(theta))
    P, dP, Q = sp.schmidt_legendre(3, theta)
    # Schmidt semi-normalised closed forms (Chapman and Bartels 1940; Winch et al. 2005, GJI 160:487):
    np.testing.assert_allclose(P[1, 0], c, atol=1e-14)
    np.testing.assert_allclose(P[1, 1], s, atol=1e-14)
    np.testing.assert_allclose(P[2, 0], 1.5 * c**2 - 0.5, atol=1e-14)
    np.testing.assert_allclose(P[2, 1], np.sqrt(3.0) * c * s, atol=1e-14)
    np.testing.assert_allclose(P[2, 2], np.sqrt(3.0) / 2 * s**2, atol=1e-14)
    np.testing.assert_allclose(P[3, 3], np.sqrt(10.0) / 4 * s**3, atol=1e-14)
    # derivatives of the closed forms (calculus)
    np.testing.assert_allclose(dP[2, 0], -3 * c * s, atol=1e-14)
    np.testing.assert_allclose(dP[2, 2], np.sqrt(3.0) * s * c, atol=1e-14)
    np.testing.assert_allclose(Q[2, 1], np.sqrt(3.0) * c, atol=1e-14)


@pytest.mark.parametrize("source", ["internal", "external"])
@pytest.mark.parametrize("nmax", [1, 2, 5])
def test_synthesis_agrees_with_chaosmagpy(source, nmax):
    rng = np.random.default_rng(nmax)
    coefs = rng.normal(0.0, 20.0, sp.n_coefficients(nmax))
    theta = rng.uniform(2.0, 178.0, 60)
    phi = rng.uniform(-180.0, 180.0, 60)
    radius_km = A_KM + rng.uniform(-20.0, 800.0, 60)
    ref = cpm.synth_values(coefs, radius_km, theta, phi, nmax=nmax, source=source)
    mine = sp.synthesis(coefs, radius_km * 1000.0, theta, phi, source=source)
    for a, b in zip(ref, mine):
        # chaosmagpy.model_utils.synth_values (reference library): same convention (B_r, B_theta,
        # B_phi; internal (a/r)^(n+2), external (r/a)^(n-1)); agreement to rounding, 1e-9 nT.
        np.testing.assert_allclose(b, a, rtol=0, atol=1e-9)
    # a time axis of coefficients broadcasts (two epochs at once)
    two = sp.synthesis(np.vstack([coefs, 2 * coefs]), radius_km * 1000.0, theta, phi, source=source)
    np.testing.assert_allclose(two[0][1], 2 * ref[0], atol=1e-9)


def test_names_follow_the_igrf_order():
    assert sp.coefficient_names(2) == ["g10", "g11", "h11", "g20", "g21", "h21", "g22", "h22"]
    assert sp.coefficient_names(1, "external") == ["q10", "q11", "s11"]


# ----------------------------------------------------------------------------------------------
# sphere: Gauss coefficients from a network
# ----------------------------------------------------------------------------------------------
LAT = np.array([62.0, 48.5, 35.2, 18.9, 5.1, -8.7, -22.0, -36.4, -51.9, 70.3, 28.0, -15.5])
LON = np.array([-150.0, -95.0, -40.0, 10.0, 55.0, 100.0, 145.0, -175.0, -70.0, 30.0, 120.0, -120.0])
HGT = np.linspace(0.0, 900.0, LAT.size)


def test_recovers_known_coefficients_from_a_chaosmagpy_network():
    rng = np.random.default_rng(7)
    ni, ne, epochs = 2, 2, 40
    g = rng.normal(0.0, 8.0, (epochs, sp.n_coefficients(ni)))
    q = rng.normal(0.0, 15.0, (epochs, sp.n_coefficients(ne)))
    comps = [
        a + b
        for a, b in zip(
            _chaos_geodetic(g[:, None, :], LON, LAT, HGT, "internal"),
            _chaos_geodetic(q[:, None, :], LON, LAT, HGT, "external"),
        )
    ]
    sigma = 0.1
    comps = [c + rng.normal(0.0, sigma, c.shape) for c in comps]
    fit = fit_gauss_coefficients(*comps, LON, LAT, HGT, internal_degree=ni, external_degree=ne)
    truth = np.hstack([g, q])
    G = np.vstack(sp.geodetic_design_matrices(LON, LAT, HGT, ni, "internal"))
    G = np.hstack([G, np.vstack(sp.geodetic_design_matrices(LON, LAT, HGT, ne, "external"))])
    formal = sigma * np.sqrt(np.diag(np.linalg.inv(G.T @ G)))
    # Data synthesised by chaosmagpy (reference library) with 0.1 nT noise: every coefficient
    # within 5 formal standard errors sigma sqrt(diag((G^T G)^-1)) (least-squares theory).
    assert np.all(np.abs(fit.coefficients - truth) < 5 * formal)
    assert fit.groups == 1 and fit.unsolved_epochs == 0
    assert np.nanstd(fit.residual) < 1.5 * sigma


def test_induced_ratio_in_the_earths_range_is_recovered():
    rng = np.random.default_rng(3)
    minutes = np.arange(3 * 1440.0)
    hours = minutes / 60.0
    storm = np.where(hours < 30, 15.0, 15.0 + 90.0 * np.exp(-(hours - 30.0) / 12.0))  # Dst-like
    q = np.column_stack([storm, 6 * np.cos(2 * np.pi * hours / 24), 6 * np.sin(2 * np.pi * hours / 24)])
    # 0.27: within the Earth's storm-time degree-1 range 0.25-0.3 (from memory; references.md).
    ratio = 0.27
    comps = [
        a + b
        for a, b in zip(
            _chaos_geodetic(ratio * q[:, None, :], LON, LAT, HGT, "internal"),
            _chaos_geodetic(q[:, None, :], LON, LAT, HGT, "external"),
        )
    ]
    comps = [c + rng.normal(0.0, 0.5, c.shape) for c in comps]
    fit = fit_gauss_coefficients(*comps, LON, LAT, HGT)
    est = induction_ratio(fit.coefficient("g10"), fit.coefficient("q10"))
    # Regression slope of g10 on q10 over a 90 nT storm with 0.5 nT noise: the slope's
    # standard error is below 1e-3, so 0.005 is a safe bound (least-squares theory).
    assert abs(est["ratio"] - ratio) < 0.005
    assert est["correlation"] > 0.99


@pytest.mark.skipif(
    not (DEMO / "truth" / "coefficients.csv").is_file(), reason="the observatory demo is not in this checkout"
)
def test_demo_observatory_true_coefficients_recovered(tmp_path):
    """The demo's degree-1 truth is recovered up to what its unmodelled parts predict.

    A degree-1 least-squares fit maps everything it does not model (degree-2 external and
    induced fields, the non-potential part) into the coefficients through the pseudo-inverse
    G+ of the design matrix: error = G+ (unmodelled) + G+ (noise). The unmodelled part is built
    here from the truth files with chaosmagpy, so the test bound is only the noise term.
    """
    from potfield.pipeline import run_survey

    root = tmp_path / "obs"
    root.mkdir()
    for part in ("survey.toml", "raw", "truth"):
        src = DEMO / part
        (shutil.copytree if src.is_dir() else shutil.copy)(src, root / part)
    # absolute coefficients: no station baselines (the default removes each station's median,
    # which shifts every coefficient by a constant; tests/stages/test_separate.py checks that)
    toml = root / "survey.toml"
    toml.write_text(toml.read_text().replace("[separate]\n", '[separate]\nstation_baseline = "none"\n'))
    run_survey(root, until="separate")
    coef = pd.read_csv(root / "out" / "tables" / "coefficients.csv")
    truth = pd.read_csv(root / "truth" / "coefficients.csv")
    params = json.loads((root / "truth" / "parameters.json").read_text())
    stations = pd.DataFrame(params["stations"]).sort_values("code").reset_index(drop=True)
    st = pd.read_csv(root / "truth" / "stations_truth.csv")
    readings = pd.read_csv(
        root / "out" / "tables" / "readings.csv",
        usecols=lambda c: c in ("station", "time") or c.startswith("flag_"),
    )
    flags = [c for c in readings.columns if c.startswith("flag_")]
    lon, lat, h = (stations[k].to_numpy(float) for k in ("longitude", "latitude", "elevation_m"))
    n_t = len(truth)
    ext1 = truth[["q10", "q11", "s11"]].to_numpy()
    ind1 = truth[["g10_induced", "g11_induced", "h11_induced"]].to_numpy()
    deg1 = [
        a + b
        for a, b in zip(
            _chaos_geodetic(ind1[:, None, :], lon, lat, h, "internal"),
            _chaos_geodetic(ext1[:, None, :], lon, lat, h, "external"),
        )
    ]
    unmodelled, complete = [], np.ones(n_t, dtype=bool)
    order = {code: i for i, code in enumerate(stations["code"])}
    st = st.assign(col=st["station"].map(order)).sort_values(["col", "time"])
    for k, comp in enumerate(("north", "east", "down")):
        total = (st[f"external_{comp}"] + st[f"induced_{comp}"] + st[f"nonpotential_{comp}"]).to_numpy()
        unmodelled.append(total.reshape(len(stations), n_t).T - deg1[k])
    complete &= (st["gap"].to_numpy().reshape(len(stations), n_t).T == 0).all(axis=1)
    bad_times = set(readings.loc[readings[flags].astype(bool).any(axis=1), "time"]) if flags else set()
    complete &= (
        ~pd.Series(truth["time"])
        .str.replace("Z", "")
        .isin({t.replace("Z", "")[:19] for t in bad_times})
        .to_numpy()
    )
    G = np.hstack(
        [
            np.vstack(sp.geodetic_design_matrices(lon, lat, h, 1, "internal")),
            np.vstack(sp.geodetic_design_matrices(lon, lat, h, 1, "external")),
        ]
    )
    pinv = np.linalg.pinv(G)
    predicted_error = np.hstack(unmodelled) @ pinv.T
    fitted = coef[["g10", "g11", "h11", "q10", "q11", "s11"]].to_numpy()
    actual_error = fitted - np.hstack([ind1, ext1])
    noise = params["noise_sigma_nT"]["vector"]
    bound = 5 * noise * np.sqrt((pinv**2).sum(axis=1)) + 0.01  # 5 sigma of G+ noise, + rounding
    assert complete.sum() > 0.75 * n_t  # gaps of up to 90 min at every station leave ~85 %
    diff = np.abs(actual_error - predicted_error)[complete]
    # Demo truth (truth/coefficients.csv, stations_truth.csv) synthesised with chaosmagpy here;
    # the remaining difference is the 0.1 nT noise through G+ (least-squares theory).
    assert np.all(diff < bound), (diff.max(axis=0), bound)
    # and the induced ratio is the demo's 0.27 within what the leakage allows (measured 0.272)
    est = induction_ratio(coef["g10"], coef["q10"])
    assert abs(est["ratio"] - params["induced_ratio"]["1"]) < 0.01


# ----------------------------------------------------------------------------------------------
# plane: dipoles below, line currents above
# ----------------------------------------------------------------------------------------------
E = np.arange(-10000.0, 10001.0, 100.0)
EE, NN = np.meshgrid(E, E)
INNER = (slice(50, -50), slice(50, -50))  # 5 km from the edges of the 20 km window
MU0 = 4e-7 * np.pi  # vacuum permeability (CODATA, to 1e-10)


def _dipoles(up):
    """harmonica.dipole_magnetic (reference library): three dipoles 400-800 m below the plane."""
    pts = (
        np.array([-1500.0, 2000.0, 500.0]),
        np.array([1000.0, -1500.0, 2500.0]),
        np.array([-500.0, -800.0, -400.0]),
    )
    moments = [
        hm.magnetic_angles_to_vec(m, i, d) for m, i, d in ((3e8, 60, 10), (5e8, 45, -20), (2e8, -30, 80))
    ]
    moments = tuple(np.array(c) for c in zip(*moments))
    be, bn, bu = hm.dipole_magnetic((EE, NN, np.full_like(EE, up)), pts, moments, field="b")
    return np.stack([bn, be, -bu])


def _line_currents(up):
    """Infinite horizontal line currents 3-4 km above the plane, Biot-Savart law:
    B = mu0 I / (2 pi r) along l x r_hat (Jackson 1999, Classical Electrodynamics, 3rd ed., sec. 5.3)."""
    total = np.zeros((3,) + EE.shape)
    for current, height, azimuth, offset in ((5e3, 3000.0, 30.0, 1000.0), (-3e3, 4000.0, 110.0, -2000.0)):
        l = np.array([np.cos(np.radians(azimuth)), np.sin(np.radians(azimuth)), 0.0])
        d = np.stack([EE, NN - offset, np.full_like(EE, up) - height])
        perp = d - l[:, None, None] * np.tensordot(l, d, 1)
        r = np.linalg.norm(perp, axis=0)
        total += MU0 * current / (2 * np.pi * r) * np.cross(l[:, None, None], perp, axis=0) / r * 1e9
    be, bn, bu = total
    return np.stack([bn, be, -bu])


def _grids(values):
    return [
        make_grid(E, E, values[i], name=c, units="nT", long_name=c)
        for i, c in enumerate(("north", "east", "down"))
    ]


def test_vector_plane_separation_dipoles_alone_is_exact():
    dip = _dipoles(0.0)
    parts = separate_vector_plane(*_grids(dip))
    for i, comp in enumerate(("north", "east", "down")):
        err = parts[f"internal_{comp}"].values - dip[i]
        # harmonica.dipole_magnetic (reference library): a field wholly from below is wholly
        # internal; dipole fields fall off as r^-3 so the window holds them: 0.1 % of the peak
        # (measured 0.007-0.013 %), after removing the mean that one plane cannot attribute.
        assert np.abs(err - err[INNER].mean())[INNER].max() < 1e-3 * np.abs(dip[i]).max()


def test_vector_plane_separation_recovers_dipoles_below_and_currents_above():
    dip, cur = _dipoles(0.0), _line_currents(0.0)
    parts = separate_vector_plane(*_grids(dip + cur))
    for i, comp in enumerate(("north", "east", "down")):
        for side, truth, other in (("internal", dip[i], cur[i]), ("external", cur[i], dip[i])):
            err = parts[f"{side}_{comp}"].values - truth
            err = np.abs(err - err[INNER].mean())[INNER]
            # harmonica dipoles + Biot-Savart line currents (outside references): 1/r current
            # fields keep much of their power at wavelengths beyond the 20 km window, which no
            # finite-window separation can attribute; bound 3 % of the combined field's range
            # in the inner region (measured 0.5-1.2 %).
            scale = np.ptp((dip[i] + cur[i])[INNER])
            assert err.max() < 0.03 * scale, (side, comp, err.max() / scale)
            # and the sign convention is pinned: the other source's field is not in this part
            wrong = np.abs(parts[f"{side}_{comp}"].values - other)[INNER]
            assert wrong.max() > 5 * err.max()


def test_two_heights_separation_of_a_harmonic_scalar():
    lower = make_grid(E, E, (_dipoles(0.0) + _line_currents(0.0))[2], name="z0", units="nT", long_name="Z")
    upper = make_grid(
        E, E, (_dipoles(200.0) + _line_currents(200.0))[2], name="z1", units="nT", long_name="Z"
    )
    internal, external = separate_two_heights(lower, upper, 200.0)
    dip, cur = _dipoles(0.0)[2], _line_currents(0.0)[2]
    for part, truth in ((internal, dip), (external, cur)):
        err = part.values - truth
        err = np.abs(err - err[INNER].mean())[INNER]
        # Z of harmonica dipoles + Biot-Savart currents at two heights 200 m apart (outside
        # references): within 2 % of the field's range (measured 0.7 %); the long wavelengths
        # held back by the regularisation go to the external side, so the parts add up.
        assert err.max() < 0.02 * np.ptp((dip + cur)[INNER])


# ----------------------------------------------------------------------------------------------
# regional / residual: a deep and a shallow prism body (harmonica.prism_gravity)
# ----------------------------------------------------------------------------------------------
GE = np.arange(-6000.0, 6001.0, 250.0)
GEE, GNN = np.meshgrid(GE, GE)
DEEP = [[-3000.0, 2000.0, -2000.0, 3000.0, -7000.0, -4000.0]]
SHALLOW = [[-900.0, 100.0, 200.0, 1000.0, -450.0, -150.0], [1500.0, 2300.0, -2500.0, -1800.0, -400.0, -100.0]]
H0 = 100.0
GIN = (slice(8, -8), slice(8, -8))  # 2 km from the edges


def _gz(prisms, density, up):
    """harmonica.prism_gravity (reference library), g_z in mGal."""
    return hm.prism_gravity((GEE, GNN, np.full_like(GEE, up)), prisms, density, field="g_z")


def test_upward_continuation_residual_matches_the_exact_continued_fields():
    deep, shallow = _gz(DEEP, [300.0], H0), _gz(SHALLOW, [400.0, -300.0], H0)
    grid = make_grid(GE, GE, deep + shallow, name="bouguer_anomaly", units="mGal", long_name="g")
    height = 1000.0
    regional, residual = regional_upward(grid, height)
    up = _gz(DEEP, [300.0], H0 + height) + _gz(SHALLOW, [400.0, -300.0], H0 + height)
    expected = deep + shallow - up
    # harmonica prisms evaluated 1000 m higher are the exact continuation (reference library):
    # the FFT result agrees within 12 % of the field's range 2 km from the edges (the deep
    # field is not decayed at the window edge, so the padding cannot be exact; measured 8.2 %).
    fft_error = np.abs(residual.values - expected)[GIN].max()
    assert fft_error < 0.12 * np.ptp(deep + shallow)
    # The residual recovers the shallow field within what continuation itself leaves: the deep
    # field's change over 1000 m plus the shallow field still present at 1000 m (Jacobsen 1987),
    # plus the FFT error above.
    bound = np.abs(expected - shallow)[GIN] + fft_error
    assert np.all(np.abs(residual.values - shallow)[GIN] <= bound + 1e-9)
    assert regional.attrs["separation_method"] == "fft"


def test_upward_by_an_exact_model_is_exact():
    class Prisms:  # a "model" that is the true sources (harmonica), to pin the model route
        def predict(self, coordinates):
            e, n, u = coordinates
            return hm.prism_gravity((e, n, u), DEEP, [300.0], field="g_z") + hm.prism_gravity(
                (e, n, u), SHALLOW, [400.0, -300.0], field="g_z"
            )

    deep, shallow = _gz(DEEP, [300.0], H0), _gz(SHALLOW, [400.0, -300.0], H0)
    grid = make_grid(GE, GE, deep + shallow, name="g", units="mGal", long_name="g")
    regional, _ = regional_upward(grid, 1000.0, model=Prisms(), grid_height=H0)
    up = _gz(DEEP, [300.0], H0 + 1000.0) + _gz(SHALLOW, [400.0, -300.0], H0 + 1000.0)
    # harmonica prisms (reference library) at the higher surface: identical to rounding
    np.testing.assert_allclose(regional.values, up, atol=1e-9)
    assert regional.attrs["separation_method"] == "model"


def test_two_layer_residual_recovers_the_shallow_body():
    deep, shallow = _gz(DEEP, [300.0], H0), _gz(SHALLOW, [400.0, -300.0], H0)
    data = deep + shallow
    model = fit_two_layer(
        (GEE, GNN, np.full_like(GEE, H0)),
        data,
        deep_depth=3000.0,
        shallow_depth=300.0,
        crossover_wavelength=3000.0,
    )
    residual = data - model.predict_regional((GEE, GNN, np.full_like(GEE, H0)))
    rms = float(np.sqrt(np.mean((residual - shallow)[GIN] ** 2)))
    # harmonica prisms (reference library). Bound: damped least squares splits each wavenumber
    # k between the layers as 1 / (1 + exp(2 k (h_d - h_s) - ln rho)) (two_layer_dampings), so
    # the shallow body's own long wavelengths go to the regional and the deep body's short ones
    # stay. That ideal split, applied here to the true fields in the wavenumber domain, leaves
    # 0.178 mGal RMS; the discrete fit (finite window, point sources) must follow it within
    # 0.05 mGal RMS (measured 0.022) and do no worse than it by more than that.
    prep = tf.pad_grid(
        make_grid(GE, GE, data, name="d", units="mGal", long_name="d"), 1.0, "edge", detrend=False
    )
    _, _, k = prep.wavenumbers()
    split = 1.0 / (1.0 + np.exp(2 * (3000.0 - 300.0) * (k - 2 * np.pi / 3000.0)))
    ideal = data - prep.unpad(scipy.fft.irfft2(scipy.fft.rfft2(prep.padded) * split, s=prep.padded.shape))
    rms_ideal = float(np.sqrt(np.mean((ideal - shallow)[GIN] ** 2)))
    assert float(np.sqrt(np.mean((residual - ideal)[GIN] ** 2))) < 0.05
    assert rms < rms_ideal + 0.05
    assert rms < 0.15 * np.abs(shallow).max()  # 15 % of the shallow peak (measured 9.5 %)
    # better than the classical upward continuation (Jacobsen 1987) at the same scale, whose
    # error is computed exactly with harmonica at 1500 m higher
    up = _gz(DEEP, [300.0], H0 + 1500.0) + _gz(SHALLOW, [400.0, -300.0], H0 + 1500.0)
    rms_upward = float(np.sqrt(np.mean((data - up - shallow)[GIN] ** 2)))
    assert rms < rms_upward
    assert model.rms < 0.02 * np.ptp(data)  # the two layers together fit the data
