"""Unit tests of potfield.fields.harmonic.transforms: padding, filling, masks, orientation, attributes,
errors. The physics against outside references is in tests/reference/test_transforms_analytic.py.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from potfield.fields.errors import FieldError
from potfield.fields.harmonic import transforms as tf
from potfield.io.grids import make_grid

G = 6.6743e-11  # CODATA 2018

E = np.arange(0.0, 8000.0, 100.0)  # 80 cells
N = np.arange(0.0, 6000.0, 100.0)  # 60 cells
EE, NN = np.meshgrid(E, N)


def _point_gz(height=0.0, depth=800.0, mass=5e10, e0=4100.0, n0=2900.0):
    """g_z (mGal) of a point mass: G m z / r^3 (Blakely 1995, Potential Theory in Gravity and
    Magnetic Applications, CUP)."""
    z = height + depth
    r = np.sqrt((EE - e0) ** 2 + (NN - n0) ** 2 + z**2)
    return G * mass * z / r**3 * 1e5


def _grid(values=None, name="bouguer_anomaly"):
    values = _point_gz() if values is None else values
    return make_grid(E, N, values, name=name, units="mGal", long_name="Bouguer anomaly", history="gridded")


def _plane(a=3.0, b=2e-3, c=-1e-3):
    return a + b * EE + c * NN


# --- padding --------------------------------------------------------------------------------
def test_pad_grid_pads_at_least_the_fraction_and_tapers_to_zero():
    prep = tf.pad_grid(_grid(), pad_fraction=0.25)
    ny, nx = prep.padded.shape
    # common practice: >= 25 % per side
    assert prep.inner[0].start >= 0.25 * N.size and ny - prep.inner[0].stop >= 0.25 * N.size
    assert prep.inner[1].start >= 0.25 * E.size and nx - prep.inner[1].stop >= 0.25 * E.size
    # inner part = data minus the plane, untouched by the taper
    np.testing.assert_allclose(prep.unpad(prep.padded), _point_gz() - prep.plane, atol=1e-12)
    # the cosine taper brings the outer rim close to zero
    rim = np.concatenate([prep.padded[0], prep.padded[-1], prep.padded[:, 0], prep.padded[:, -1]])
    assert np.abs(rim).max() < 0.05 * np.abs(prep.padded).max()


def test_pad_grid_removes_a_plane_exactly():
    prep = tf.pad_grid(_grid(_plane()))
    np.testing.assert_allclose(prep.plane, _plane(), atol=1e-9)
    assert prep.slope == pytest.approx((2e-3, -1e-3), abs=1e-12)
    assert np.abs(prep.padded).max() < 1e-9


@pytest.mark.parametrize("kwargs", [{"pad_fraction": 0.1}, {"mode": "wrap"}])
def test_pad_grid_refuses_bad_options(kwargs):
    with pytest.raises(FieldError):
        tf.pad_grid(_grid(), **kwargs)


def test_bad_grids_are_user_errors_with_one_line():
    irregular = _grid().assign_coords(easting=np.r_[E[:-1], E[-1] + 50.0])
    with pytest.raises(FieldError, match="not regular") as info:
        tf.upward_continuation(irregular, 100.0)
    assert "\n" not in str(info.value)
    with pytest.raises(FieldError, match="dimensions"):
        tf.vertical_derivative(xr.DataArray(np.zeros((5, 5)), dims=("y", "x")))
    with pytest.raises(FieldError, match="no valid"):
        tf.tilt_angle(_grid(np.full(EE.shape, np.nan)))


# --- linear functions (harmonic: continue unchanged, derivatives exact; common practice) -----
def test_plane_is_continued_unchanged_and_differentiated_exactly():
    grid = _grid(_plane())
    np.testing.assert_allclose(tf.upward_continuation(grid, 300.0).values, _plane(), atol=1e-9)
    np.testing.assert_allclose(tf.vertical_derivative(grid).values, 0.0, atol=1e-12)
    for method in ("central", "fft"):
        dx, dy = tf.horizontal_derivatives(grid, method)
        np.testing.assert_allclose(dx.values, 2e-3, atol=1e-12)
        np.testing.assert_allclose(dy.values, -1e-3, atol=1e-12)


def test_zero_continuation_is_identity():
    grid = _grid()
    np.testing.assert_allclose(tf.upward_continuation(grid, 0.0).values, grid.values, atol=1e-12)
    np.testing.assert_allclose(tf.downward_continuation(grid, 0.0).values, grid.values, atol=1e-12)


# --- orientation ----------------------------------------------------------------------------
FUNCTIONS = {
    "upward": lambda g: tf.upward_continuation(g, 200.0),
    "downward": lambda g: tf.downward_continuation(g, 100.0),
    "dz1": lambda g: tf.vertical_derivative(g, 1),
    "dz2": lambda g: tf.vertical_derivative(g, 2),
    "dx": lambda g: tf.horizontal_derivatives(g)[0],
    "dy": lambda g: tf.horizontal_derivatives(g)[1],
    "dy_fft": lambda g: tf.horizontal_derivatives(g, "fft")[1],
    "thg": tf.total_horizontal_gradient,
    "tga": tf.total_gradient_amplitude,
    "tilt": tf.tilt_angle,
    "rtp": lambda g: tf.reduction_to_pole(g, 40.0, 25.0),
    "rtp_pseudo": lambda g: tf.reduction_to_pole(g, 12.0, -15.0, method="pseudo"),
    "rtp_filter": lambda g: tf.reduction_to_pole(g, 12.0, -15.0, method="filter"),
    "rtp_sources": lambda g: tf.reduction_to_pole(g, 12.0, -15.0, method="sources"),
}


@pytest.mark.parametrize("name", list(FUNCTIONS))
def test_same_result_for_descending_coordinates(name):
    grid = _grid()
    grid.values[:4, :7] = np.nan
    ref = FUNCTIONS[name](grid)
    for flip in ({"northing": slice(None, None, -1)}, {"easting": slice(None, None, -1)}):
        flipped = grid.isel(flip)
        result = FUNCTIONS[name](flipped)
        dim = next(iter(flip))
        # returned in the input's order, equal cell by cell (Blakely 1995 pitfall: N-S flip)
        assert result[dim].values[0] > result[dim].values[-1]
        np.testing.assert_allclose(
            result.sortby(dim).values, ref.values, rtol=1e-9, atol=1e-12, equal_nan=True
        )


def test_transposed_input_is_accepted():
    grid = _grid()
    np.testing.assert_allclose(tf.vertical_derivative(grid.T).values, tf.vertical_derivative(grid).values)


# --- masks and filling ----------------------------------------------------------------------
def _masked():
    grid = _grid()
    grid.values[40:, 60:] = np.nan  # a missing corner
    grid.values[10:14, 5:9] = np.nan  # an interior hole
    return grid


def test_outputs_are_masked_like_the_input():
    grid = _masked()
    for name, func in FUNCTIONS.items():
        out = func(grid)
        assert np.array_equal(np.isnan(out.values), np.isnan(grid.values)), name


def test_fill_masked_keeps_valid_cells_and_fills_holes():
    grid = _masked()
    filled = tf.fill_masked(grid)
    assert filled.attrs["fill"] == "smooth fill"
    assert np.isfinite(filled.values).all()
    valid = np.isfinite(grid.values)
    np.testing.assert_array_equal(filled.values[valid], grid.values[valid])
    with_filler = tf.fill_masked(grid, filler=_point_gz())
    assert with_filler.attrs["fill"] == "filler"
    np.testing.assert_allclose(with_filler.values, _point_gz())


def test_filler_grid_beats_smooth_fill():
    """A filler equal to the true field (as an equivalent-source prediction would be) gives
    results closer to those of the complete grid than the smooth fill."""
    full = _grid()
    grid = _masked()
    truth = tf.vertical_derivative(full).values
    valid = np.isfinite(grid.values)
    smooth = tf.vertical_derivative(grid).values
    exact = tf.vertical_derivative(grid, filler=_grid(_point_gz())).values
    err_smooth = np.abs(smooth - truth)[valid].max()
    err_exact = np.abs(exact - truth)[valid].max()
    assert err_exact < 0.2 * err_smooth
    assert err_exact < 1e-3 * np.abs(truth).max()


def test_array_filler_follows_the_grid_order():
    grid = _masked()
    full = tf.vertical_derivative(_grid()).values
    flipped = grid.isel(northing=slice(None, None, -1), easting=slice(None, None, -1))
    out = tf.vertical_derivative(flipped, filler=_point_gz()[::-1, ::-1])
    out = out.sortby("northing").sortby("easting")
    valid = np.isfinite(grid.values)
    # an exact filler reproduces the complete grid's result (so the filler was not misaligned)
    np.testing.assert_allclose(out.values[valid], full[valid], rtol=1e-9, atol=1e-15)


def test_filler_on_other_cells_is_refused():
    other = make_grid(E + 50.0, N, _point_gz(), name="f", units="mGal", long_name="f")
    with pytest.raises(FieldError, match="same cells"):
        tf.upward_continuation(_masked(), 100.0, filler=other)
    with pytest.raises(FieldError, match="shape"):
        tf.upward_continuation(_masked(), 100.0, filler=np.zeros((3, 3)))


# --- attributes -----------------------------------------------------------------------------
def test_attributes_units_long_name_history():
    grid = _grid()
    up = tf.upward_continuation(grid, 250.0)
    assert up.attrs["units"] == "mGal"
    assert "250 m" in up.attrs["long_name"]
    assert up.attrs["history"].startswith("gridded; upward continuation by 250 m")
    assert up.name == "bouguer_anomaly_upward"
    assert tf.vertical_derivative(grid, 2).attrs["units"] == "mGal/m^2"
    assert tf.total_gradient_amplitude(grid).attrs["units"] == "mGal/m"
    tilt = tf.tilt_angle(grid)
    assert tilt.attrs["units"] == "degree"
    assert np.abs(tilt.values).max() <= 90.0  # Miller and Singh (1994): an angle in [-90, 90]


def test_rtp_method_choice_and_attributes():
    grid = _grid(name="anomaly")
    auto_high = tf.reduction_to_pole(grid, 45.0, 3.0, method="auto")
    auto_low = tf.reduction_to_pole(grid, -12.0, 3.0, method="auto")
    assert auto_high.attrs["rtp_method"] == "plain" and "pseudo_inclination" not in auto_high.attrs
    # below 35 deg "auto" fits an equivalent dipole layer (Silva 1986; Li and Oldenburg 2001)
    assert auto_low.attrs["rtp_method"] == "sources" and "pseudo_inclination" not in auto_low.attrs
    assert "Li and Oldenburg" in auto_low.attrs["history"]
    assert tf.reduction_to_pole(grid, -34.0, 3.0, method="auto").attrs["rtp_method"] == "sources"
    assert tf.reduction_to_pole(grid, 35.0, 3.0, method="auto").attrs["rtp_method"] == "plain"
    pseudo = tf.reduction_to_pole(grid, -12.0, 3.0, method="pseudo")
    assert pseudo.attrs["pseudo_inclination"] == 30.0
    assert "MacLeod" in pseudo.attrs["history"]
    # the pseudo filter with I' = |I| is the plain filter (MacLeod et al. 1993 formula)
    same = tf.reduction_to_pole(grid, 45.0, 3.0, method="pseudo", pseudo_inclination=45.0)
    np.testing.assert_allclose(same.values, auto_high.values, atol=1e-9 * np.abs(auto_high.values).max())
    # the default pseudo filter is continuous with the plain one at the auto threshold (30 deg)
    at = tf.reduction_to_pole(grid, 30.0, 3.0, method="pseudo")
    np.testing.assert_allclose(
        at.values, tf.reduction_to_pole(grid, 30.0, 3.0).values, atol=1e-9 * np.abs(at.values).max()
    )


def test_rtp_refuses_half_a_magnetisation_direction():
    with pytest.raises(FieldError, match="both"):
        tf.reduction_to_pole(_grid(), 45.0, 0.0, mag_inclination=30.0)
    with pytest.raises(FieldError, match="method"):
        tf.reduction_to_pole(_grid(), 45.0, 0.0, method="wiener")


def test_rtp_with_remanent_direction_equal_to_field_is_induced():
    grid = _grid(name="anomaly")
    a = tf.reduction_to_pole(grid, 50.0, 10.0)
    b = tf.reduction_to_pole(grid, 50.0, 10.0, mag_inclination=50.0, mag_declination=10.0)
    np.testing.assert_allclose(a.values, b.values)
    c = tf.reduction_to_pole(grid, 50.0, 10.0, mag_inclination=-20.0, mag_declination=150.0)
    assert np.abs(c.values - a.values).max() > 0.1 * np.abs(a.values).max()


def test_continuation_argument_errors():
    with pytest.raises(FieldError, match=">= 0"):
        tf.upward_continuation(_grid(), -10.0)
    with pytest.raises(FieldError, match=">= 0"):
        tf.downward_continuation(_grid(), -10.0)
    with pytest.raises(FieldError, match="order"):
        tf.vertical_derivative(_grid(), 3)
    with pytest.raises(FieldError, match="method"):
        tf.horizontal_derivatives(_grid(), "spline")


def test_downward_explicit_regularisation_is_used():
    down = tf.downward_continuation(_grid(_point_gz(200.0)), 200.0, regularisation=25.0)
    assert down.attrs["regularisation_m2"] == 25.0
    assert down.attrs["continuation_m"] == -200.0


def test_model_upward_continuation_predicts_at_the_higher_surface():
    """With the exact field as the 'model', the result is the analytic field above
    (G m z / r^3; Blakely 1995), masked like the input."""

    def predict(coordinates):
        e, n, u = coordinates
        z = u + 800.0
        r = np.sqrt((e - 4100.0) ** 2 + (n - 2900.0) ** 2 + z**2)
        return G * 5e10 * z / r**3 * 1e5

    grid = _masked()
    up = tf.model_upward_continuation(predict, grid, 300.0, grid_height=0.0)
    valid = np.isfinite(grid.values)
    np.testing.assert_allclose(up.values[valid], _point_gz(300.0)[valid], rtol=1e-12)
    assert np.isnan(up.values[~valid]).all()
    assert up.attrs["units"] == "mGal" and "source model" in up.attrs["long_name"]
    # the FFT route agrees away from the edges within 1 % of the peak
    fft = tf.upward_continuation(tf.fill_masked(grid, filler=_point_gz()), 300.0)
    inner = (slice(15, 35), slice(15, 55))
    assert np.abs(fft.values - _point_gz(300.0))[inner].max() < 0.01 * _point_gz(300.0).max()


def test_height_coordinate_follows_the_continuation():
    grid = _grid().assign_coords(upward=(("northing", "easting"), np.full(EE.shape, 120.0)))
    assert float(tf.upward_continuation(grid, 300.0).upward.max()) == 420.0
    assert float(tf.downward_continuation(grid, 100.0).upward.max()) == 20.0
    assert float(tf.vertical_derivative(grid).upward.max()) == 120.0
