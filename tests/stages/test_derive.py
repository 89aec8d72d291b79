"""The derive stage on small grids built here (no pipeline, no files except the model)."""

from __future__ import annotations

import harmonica as hm
import numpy as np
import pytest

from potfield.config import parse_config
from potfield.errors import ConfigError, StageError
from potfield.io.grids import make_grid, read_netcdf, write_netcdf
from potfield.stages.base import StageContext
from potfield.stages.derive import STAGE
from potfield.survey import Survey

G = 6.6743e-11  # CODATA 2018
E = np.arange(-4000.0, 4001.0, 100.0)
N = np.arange(-3500.0, 3501.0, 100.0)
EE, NN = np.meshgrid(E, N)
INNER = (slice(20, -20), slice(20, -20))


def _tfa(inc, dec, height=0.0):
    """Induced dipole total-field anomaly B . F_hat (nT) with harmonica.dipole_magnetic."""
    moment = hm.magnetic_angles_to_vec(5e8, inc, dec)
    b = hm.dipole_magnetic((EE, NN, np.full_like(EE, height)), (0.0, 0.0, -400.0), moment, field="b")
    f = hm.magnetic_angles_to_vec(1.0, inc, dec)
    return sum(bi * fi for bi, fi in zip(b, f))


def _point_gz(height=0.0, depth=700.0, mass=4e10):
    """Point-mass g_z = G m z / r^3 in mGal (Blakely 1995, Potential Theory in Gravity and
    Magnetic Applications, CUP)."""
    z = height + depth
    r = np.sqrt(EE**2 + NN**2 + z**2)
    return G * mass * z / r**3 * 1e5


def _ctx(tmp_path, kind="magnetic", grids=None, state=None, derive=None):
    data = {"survey": {"name": "t", "kind": kind}}
    if derive:
        data["derive"] = derive
    return StageContext(
        config=parse_config(data), survey=Survey(tmp_path), table=None, state=state or {}, grids=grids or {}
    )


def _mask(values):
    values = values.copy()
    values[:6, :10] = np.nan
    values[-3:, :] = np.nan
    return values


def test_magnetic_products_masked_like_input_and_rtp_matches_pole(tmp_path):
    inc, dec = 55.0, -8.0
    grid = make_grid(E, N, _mask(_tfa(inc, dec)), name="anomaly", units="nT", long_name="total-field anomaly")
    ctx = _ctx(
        tmp_path, grids={"anomaly": grid}, state={"reference": {"inclination": inc, "declination": dec}}
    )
    out = STAGE.run(ctx)
    expected = {
        f"anomaly_{p}"
        for p in (
            "reduced_to_pole",
            "vertical_derivative",
            "second_vertical_derivative",
            "x_derivative",
            "y_derivative",
            "total_horizontal_gradient",
            "analytic_signal",
            "tilt_angle",
            "upward_500m",
        )
    }
    assert set(out.grids) == expected
    assert out.state["products"]["reduced_to_pole"] == "anomaly_reduced_to_pole"
    for name, result in out.grids.items():
        assert result.name == name
        assert np.array_equal(np.isnan(result.values), np.isnan(grid.values)), name
        assert {"units", "long_name", "history"} <= set(result.attrs)
    assert out.metrics["rtp_method"] == "plain"
    assert out.metrics["fill"] == "smooth fill"
    for name, result in out.grids.items():  # attributes are NetCDF-CF writable, values round-trip
        path = write_netcdf(tmp_path / "grids" / f"{name}.nc", result, "EPSG:32633")
        back = read_netcdf(path)
        np.testing.assert_array_equal(back.values, result.values)
        assert back.attrs["units"] == result.attrs["units"]
    assert any("plain filter" in note for note in out.notes)
    # Baranov RTP against the dipole's anomaly at the pole (harmonica.dipole_magnetic):
    # within 2 % of the peak away from edges and mask (measured 0.21 %).
    pole = _tfa(90.0, 0.0)
    err = np.abs(out.grids["anomaly_reduced_to_pole"].values - pole)[INNER]
    assert np.nanmax(err) < 0.02 * np.abs(pole).max()
    # upward by upward_m = 500 m (default) against harmonica at 500 m: within 1 % of the peak
    # (measured 0.30 %)
    up = _tfa(inc, dec, 500.0)
    assert np.nanmax(np.abs(out.grids["anomaly_upward_500m"].values - up)[INNER]) < 0.01 * np.abs(up).max()


def test_low_inclination_uses_the_layer_and_says_so(tmp_path):
    grid = make_grid(E, N, _mask(_tfa(12.0, 3.0)), name="anomaly", units="nT", long_name="tfa")
    ctx = _ctx(
        tmp_path,
        grids={"anomaly": grid},
        state={"reference": {"inclination": 12.0, "declination": 3.0}},
        derive={"products": ["reduced_to_pole"]},
    )
    out = STAGE.run(ctx)
    rtp = out.grids["anomaly_reduced_to_pole"]
    assert out.metrics["rtp_method"] == "sources" == rtp.attrs["rtp_method"] == out.state["rtp_method"]
    assert out.metrics["rtp_layer_depth"] == 300.0  # 3 cells of 100 m (default)
    assert any("equivalent dipole layer" in n for n in out.notes)
    assert np.array_equal(np.isnan(rtp.values), np.isnan(grid.values))
    # harmonica dipole at the pole, away from edges and mask: relative RMS <= 0.2 (measured
    # 0.12; Silva 1986; Li and Oldenburg 2001), under half the pseudo filter's (measured 0.38)
    pole = _tfa(90.0, 0.0)[INNER]

    def rel(values):
        err = values[INNER] - pole
        return np.sqrt(np.nanmean(err**2)) / np.sqrt(np.mean(pole**2))

    pseudo = STAGE.run(
        _ctx(
            tmp_path,
            grids={"anomaly": grid},
            state={"reference": {"inclination": 12.0, "declination": 3.0}},
            derive={"products": ["reduced_to_pole"], "rtp": "pseudo"},
        )
    )
    assert rel(rtp.values) <= 0.2
    assert rel(rtp.values) < 0.5 * rel(pseudo.grids["anomaly_reduced_to_pole"].values)


def test_low_inclination_pseudo_on_request(tmp_path):
    grid = make_grid(E, N, _tfa(12.0, 3.0), name="anomaly", units="nT", long_name="tfa")
    ctx = _ctx(
        tmp_path,
        grids={"anomaly": grid},
        state={"reference": {"inclination": 12.0, "declination": 3.0}},
        derive={"products": ["reduced_to_pole"], "rtp": "pseudo", "pseudo_inclination_deg": 40.0},
    )
    out = STAGE.run(ctx)
    rtp = out.grids["anomaly_reduced_to_pole"]
    assert out.metrics["rtp_method"] == "pseudo" == rtp.attrs["rtp_method"]
    assert out.metrics["rtp_pseudo_inclination_deg"] == 40.0 == rtp.attrs["pseudo_inclination"]
    assert out.state["rtp_method"] == "pseudo"
    # MacLeod et al. (1993): bounded, peak within a factor 2 of the true pole anomaly's
    # (measured 0.65)
    pole = _tfa(90.0, 0.0)
    assert 0.5 < np.abs(rtp.values).max() / np.abs(pole).max() < 2.0


def test_forced_plain_at_low_inclination(tmp_path):
    grid = make_grid(E, N, _tfa(12.0, 3.0), name="anomaly", units="nT", long_name="tfa")
    ctx = _ctx(
        tmp_path,
        grids={"anomaly": grid},
        state={"reference": {"inclination": 12.0, "declination": 3.0}},
        derive={"products": ["reduced_to_pole"], "rtp": "plain"},
    )
    out = STAGE.run(ctx)
    assert out.metrics["rtp_method"] == "plain"
    assert any("stripes" in w for w in out.warnings)  # 1/sin^2 I gain (Blakely 1995 ch. 12)


def test_gravity_skips_rtp_and_uses_bouguer_grid(tmp_path):
    grid = make_grid(E, N, _point_gz(), name="bouguer_anomaly", units="mGal", long_name="Bouguer")
    ctx = _ctx(
        tmp_path,
        kind="gravity",
        grids={"bouguer_anomaly": grid},
        derive={
            "products": ["reduced_to_pole", "vertical_derivative", "upward_continuation"],
            "upward_m": 300.0,
        },
    )
    out = STAGE.run(ctx)
    assert set(out.grids) == {"bouguer_anomaly_vertical_derivative", "bouguer_anomaly_upward_300m"}
    assert any("rtp skipped" in note for note in out.notes)
    # analytic point mass at 300 m (Blakely 1995): within 1 % of the peak away from the edges
    truth = _point_gz(300.0)
    assert np.abs(out.grids["bouguer_anomaly_upward_300m"].values - truth)[INNER].max() < 0.01 * truth.max()


def test_missing_inputs_are_stage_errors(tmp_path):
    with pytest.raises(StageError, match="grid stage"):
        STAGE.run(_ctx(tmp_path))
    grid = make_grid(E, N, _tfa(50.0, 0.0), name="anomaly", units="nT", long_name="tfa")
    with pytest.raises(StageError, match="inclination") as info:
        STAGE.run(_ctx(tmp_path, grids={"anomaly": grid}))
    assert "\n" not in str(info.value)


def test_config_rejects_unknown_product_and_small_padding():
    with pytest.raises(ConfigError, match="did you mean 'tilt_angle'"):
        parse_config({"survey": {"kind": "magnetic"}, "derive": {"products": ["tilts"]}})
    with pytest.raises(ConfigError, match="pad_fraction"):
        parse_config({"survey": {"kind": "magnetic"}, "derive": {"pad_fraction": 0.1}})


def test_equivalent_source_model_fills_and_continues_upward(tmp_path):
    eqs = pytest.importorskip("potfield.fields.harmonic.eqsources")
    fit_equivalent_sources, save_model = eqs.fit_equivalent_sources, eqs.save_model

    rng = np.random.default_rng(3)
    e = rng.uniform(-4000, 4000, 600)
    n = rng.uniform(-3500, 3500, 600)
    z = 700.0
    data = G * 4e10 * z / np.sqrt(e**2 + n**2 + z**2) ** 3 * 1e5
    model = fit_equivalent_sources(e, n, np.zeros_like(e), data, depth=500.0, damping=1e-6, method="dense")
    path = save_model(tmp_path / "out" / "cache" / "model.npz", model)
    grid = make_grid(E, N, _mask(_point_gz()), name="bouguer_anomaly", units="mGal", long_name="B")
    ctx = _ctx(
        tmp_path,
        kind="gravity",
        grids={"bouguer_anomaly": grid},
        state={"grid": {"model_path": str(path.relative_to(tmp_path)), "height": 0.0}},
        derive={"products": ["upward_continuation", "vertical_derivative"], "upward_m": 400.0},
    )
    out = STAGE.run(ctx)
    assert out.metrics["fill"] == "equivalent-source prediction"
    exact = out.grids["bouguer_anomaly_upward_400m_by_model"]
    assert np.array_equal(np.isnan(exact.values), np.isnan(grid.values))
    # analytic point mass at 400 m (Blakely 1995): the model prediction has no edge effect, so
    # it holds to 1 % of the peak over the whole unmasked grid, edges included (measured
    # 0.68 %, the model's fit); the FFT result differs from it by < 2 % RMS (measured 0.84 %).
    truth = _point_gz(400.0)
    assert np.nanmax(np.abs(exact.values - truth)) < 0.01 * truth.max()
    assert out.metrics["upward_fft_minus_model_rms"] < 0.02 * truth.max()


def test_missing_model_file_falls_back_with_warning(tmp_path):
    grid = make_grid(E, N, _mask(_point_gz()), name="bouguer_anomaly", units="mGal", long_name="B")
    ctx = _ctx(
        tmp_path,
        kind="gravity",
        grids={"bouguer_anomaly": grid},
        state={"grid": {"model_path": "out/cache/none.npz", "height": 0.0}},
        derive={"products": ["vertical_derivative"]},
    )
    out = STAGE.run(ctx)
    assert out.metrics["fill"] == "smooth fill"
    assert any("missing" in w for w in out.warnings)


def test_rtp_uses_the_grid_declination(tmp_path):
    """With a UTM grid east of the central meridian the declination is turned to grid north:
    true north lies (lambda - lambda_0) sin(phi) west of grid north (Snyder 1987, USGS PP 1395,
    transverse Mercator convergence, first-order term)."""
    inc, dec, lon, lat = 60.0, 4.0, 17.0, 60.0  # UTM 33N, central meridian 15 E
    convergence = 2.0 * np.sin(np.radians(lat))  # 1.732 deg
    grid = make_grid(E, N, _tfa(inc, dec - convergence), name="anomaly", units="nT", long_name="tfa")
    ctx = _ctx(
        tmp_path,
        grids={"anomaly": grid},
        state={
            "reference": {"inclination": inc, "declination": dec},
            "ingest": {"crs": "EPSG:32633", "centroid": [lon, lat]},
        },
        derive={"products": ["reduced_to_pole"]},
    )
    out = STAGE.run(ctx)
    assert out.metrics["rtp_declination_deg"] == dec
    assert out.metrics["rtp_grid_declination_deg"] == pytest.approx(dec - convergence, abs=0.01)
    assert out.grids["anomaly_reduced_to_pole"].attrs["declination"] == pytest.approx(
        dec - convergence, abs=0.01
    )
    pole = _tfa(90.0, 0.0)
    err = np.abs(out.grids["anomaly_reduced_to_pole"].values - pole)[INNER]
    assert err.max() < 0.02 * np.abs(pole).max()  # harmonica dipole at the pole


def test_old_product_names_are_accepted_with_a_warning():
    # renamed products (own vocabulary): the old short names still work, with one warning
    from potfield.config import PRODUCT_ALIASES, RenamedKeyWarning, parse_config

    with pytest.warns(RenamedKeyWarning, match="'dz1, upward' is an old name") as caught:
        config = parse_config(
            {"survey": {"kind": "magnetic"}, "derive": {"products": ["dz1", "upward", "tilt_angle"]}}
        )
    assert len(caught) == 1
    assert config.derive.products == ["vertical_derivative", "upward_continuation", "tilt_angle"]
    assert set(PRODUCT_ALIASES.values()) <= set(
        type(config.derive).model_fields["products"].default_factory()
    )
