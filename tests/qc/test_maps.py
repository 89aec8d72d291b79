"""Map functions: colour-scale choice, titles, histogram equalisation, figures drawn."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.colors import BoundaryNorm, TwoSlopeNorm  # noqa: E402

from potfield.io.grids import make_grid  # noqa: E402
from potfield.qc import maps  # noqa: E402


def _grid(name, values, long_name):
    east = np.arange(0.0, 2000.0, 100.0)
    north = np.arange(0.0, 1500.0, 100.0)
    return make_grid(east, north, values(east, north), name=name, units="mGal", long_name=long_name)


def _bouguer(e, n):  # -33 .. -26 mGal: all negative (the case of the issue)
    E, N = np.meshgrid(e, n)
    return -33.0 + 7.0 * np.exp(-((E - 1000) ** 2 + (N - 700) ** 2) / 4e5)


def _derivative(e, n):
    E, N = np.meshgrid(e, n)
    return np.sin(E / 300.0) * np.cos(N / 400.0) * 1e-3


def test_absolute_field_gets_equalised_scale_with_hillshade():
    grid = _grid("bouguer_anomaly", _bouguer, "Bouguer anomaly")
    assert maps.colour_scale("bouguer_anomaly", grid.values) == "equalised"
    fig, ax = plt.subplots()
    used = maps.draw_grid(ax, fig, grid)
    plt.close(fig)
    assert used["cmap"] == "viridis" and used["hillshade"] is True
    assert used["contour_interval"] in (0.5, 1.0)


def test_signed_quantity_straddling_zero_is_diverging_about_zero():
    grid = _grid("bouguer_anomaly_vertical_derivative", _derivative, "vertical derivative")
    assert maps.colour_scale(str(grid.name), grid.values) == "diverging"
    cmap, norm = maps._norm_for("diverging", grid.values)
    assert cmap == "RdBu_r" and isinstance(norm, TwoSlopeNorm) and norm.vcenter == 0.0
    # a "residual" that does not straddle zero is not forced onto a diverging scale
    assert maps.colour_scale("residual_two_layer", np.linspace(4, 11, 50)) == "equalised"
    assert maps.colour_scale("anomaly_analytic_signal", np.linspace(0, 5, 50)) == "linear"


def test_equalised_norm_spreads_colours_evenly():
    # histogram equalisation (Gonzalez and Woods, Digital Image Processing, sec. 3.3): each colour
    # covers about the same number of cells, even for skewed data
    rng = np.random.default_rng(0)
    values = rng.lognormal(0.0, 1.5, 20_000)
    norm = maps.equalised_norm(values, levels=16)
    assert isinstance(norm, BoundaryNorm)
    bins = np.digitize(values, norm.boundaries[1:-1])
    counts = np.bincount(bins, minlength=16)
    assert counts.min() > 0.8 * counts.mean() and counts.max() < 1.2 * counts.mean()


def test_titles_name_the_quantity():
    assert maps.quantity_title("bouguer_anomaly", "Bouguer anomaly") == "Bouguer anomaly"
    assert maps.quantity_title("anomaly_tilt_angle") == "Anomaly tilt angle"
    assert maps.nice_interval(np.linspace(-33, -26, 100), target=7) == 1.0


def test_grid_map_and_base_record_are_drawn(tmp_path):
    grid = _grid("bouguer_anomaly", _bouguer, "Bouguer anomaly")
    path = maps.plot_grid(grid, tmp_path / "g.png", "WGS 84 / UTM zone 55S", survey="test survey")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    time = pd.date_range("2024-11-18T22:10:00", periods=600, freq="1s")
    base = pd.DataFrame(
        {
            "base": "b",
            "time": time.strftime("%Y-%m-%dT%H:%M:%S.000Z"),
            "total_field": 57080.0 + np.sin(np.arange(600) / 60.0),
            "samples": 1,
        }
    )
    assert maps.plot_base_record(base, tmp_path / "b.png", 3.0).is_file()
    coef = pd.DataFrame(
        {
            "time": pd.date_range("2025-05-10", periods=300, freq="1min").delete(slice(100, 130)),
            "g10": 1.0,
            "q10": 2.0,
        }
    )
    assert maps.plot_coefficients(coef, tmp_path / "c.png").is_file()
