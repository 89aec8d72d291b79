"""The grid stage on a small synthetic line survey built here (no pipeline)."""

from __future__ import annotations

import harmonica as hm
import numpy as np
import pandas as pd
import pytest

from potfield.config import parse_config
from potfield.errors import ConfigError, StageError
from potfield.fields.harmonic.eqsources import load_model
from potfield.stages.base import StageContext
from potfield.stages.grid import STAGE
from potfield.survey import Survey

INC, DEC = 60.0, 10.0
SOURCE = (1500.0, 1000.0, -350.0)


def tfa(coordinates):
    """Total-field anomaly (nT) of an induced dipole: harmonica.dipole_magnetic projected on the
    main-field direction (Blakely 1995, eq. 4.10: Delta T ~ B . F_hat for |B| << |F|)."""
    moment = hm.magnetic_angles_to_vec(3e8, INC, DEC)
    b = hm.dipole_magnetic(coordinates, SOURCE, moment, field="b")
    f = hm.magnetic_angles_to_vec(1.0, INC, DEC)
    return sum(bi * fi for bi, fi in zip(b, f))


def make_table():
    rng = np.random.default_rng(2)
    rows = []
    for k, y in enumerate(np.arange(0.0, 2001.0, 200.0)):
        x = np.arange(0.0, 3000.0, 20.0)
        rows.append(
            pd.DataFrame(
                {
                    "line": f"L{k + 1:03d}",
                    "line_type": "traverse",
                    "easting": x + rng.normal(0, 1, x.size),
                    "northing": y + rng.normal(0, 4, x.size),
                    "height": 120.0 + rng.normal(0, 3, x.size),
                    "distance": x,
                }
            )
        )
    table = pd.concat(rows, ignore_index=True)
    table["anomaly"] = tfa((table.easting, table.northing, table.height))
    table["flag_spike"] = False
    table.loc[[10, 500], "flag_spike"] = True
    table.loc[[10, 500], "anomaly"] += 500.0  # spikes: must not reach the grid
    return table


def context(tmp_path, **grid):
    config = parse_config({"survey": {"kind": "magnetic"}, "grid": grid})
    survey = Survey(tmp_path)
    state = {
        "ingest": {
            "line_spacing_m": 200.0,
            "tie_spacing_m": None,
            "crs": "EPSG:32633",
            "centroid": [15.0, 45.0],
        }
    }
    return StageContext(config=config, survey=survey, table=make_table(), state=state)


@pytest.mark.parametrize(
    "grid",
    [
        {"trial_depths": [2.5, 6.0], "trial_dampings": [1e-3, 1e-1], "cv_folds": 3},
        {"method": "fft", "trial_depths": [6.0], "trial_dampings": [1e-2], "height": 300.0},
    ],
)
def test_grid_stage(tmp_path, grid):
    ctx = context(tmp_path, **grid)
    out = STAGE.run(ctx)
    result = out.table
    assert len(result) == len(ctx.table)
    assert "grid_residual" in result and result["grid_residual"].notna().all()
    # Flagged spikes are kept, excluded from the fit, and show in their residual.
    assert result.loc[[10, 500], "grid_residual"].abs().min() > 400.0
    ok = ~result.flag_spike
    # Residuals at the readings: block medians (3 readings per 50 m block) and a damped fit;
    # 3 % of the anomaly's spread (common practice for a QC residual of a gridded survey).
    assert np.sqrt(np.mean(result.grid_residual[ok] ** 2)) < 0.03 * result.anomaly[ok].std()
    anomaly = out.grids["anomaly"]
    assert anomaly.attrs["units"] == "nT"
    assert anomaly.easting[1] - anomaly.easting[0] == pytest.approx(50.0)  # line spacing / 4
    height = out.state["height"]
    assert height == pytest.approx(grid.get("height", 120.0), abs=1.0)
    # Grid against the forward model (harmonica dipole) at the grid height, away from edges;
    # bound 5 %: lines 200 m apart at 120 m above a 470 m deep source (see test_eqsources).
    ee, nn = np.meshgrid(anomaly.easting, anomaly.northing)
    core = (ee > 300) & (ee < 2700) & (nn > 300) & (nn < 1700)
    true = tfa((ee, nn, np.full(ee.shape, height)))
    error = anomaly.values[core] - true[core]
    assert np.isfinite(error).all()
    assert np.sqrt(np.mean(error**2)) < 0.05 * true[core].std()
    # Cells far from the lines are masked.
    assert np.isnan(anomaly.values).sum() == 0 or np.isnan(anomaly.values[~core]).any()
    # The saved model re-creates the grid (what derive/separate use).
    model = load_model(out.state["model_path"])
    again = model.predict((ee, nn, np.full(ee.shape, height)))
    finite = np.isfinite(anomaly.values)
    assert np.allclose(again[finite], anomaly.values[finite], rtol=1e-9, atol=1e-9)
    assert out.metrics["grid_residual_rms"] >= 0
    # the misfit at the flagged readings is reported too: the two +500 nT spikes show as such
    assert out.metrics["grid_readings_flagged"] == 2
    assert out.metrics["grid_residual_rms_flagged"] == pytest.approx(500.0, rel=0.05)
    assert out.metrics["grid_residual_rms_spikes"] == out.metrics["grid_residual_rms_flagged"]
    if len(ctx.config.grid.trial_dampings) > 1:
        cv = out.tables["grid_cv"]
        assert len(cv) == 4 and set(cv.columns) >= {"depth", "damping", "heldout_score", "rms"}
        assert out.metrics["grid_heldout_score"] == pytest.approx(cv.heldout_score.max())
    assert STAGE.sections == ("grid", "level")


def test_grid_stage_mask(tmp_path):
    ctx = context(tmp_path, mask_distance_m=30.0, trial_depths=[4.5], trial_dampings=[1e-2])
    anomaly = STAGE.run(ctx).grids["anomaly"]
    # Grid rows every 50 m, lines every 200 m: a 30 m mask keeps only the rows on the lines, so
    # about 3 rows in 4 are masked.
    masked = np.isnan(anomaly.values).mean()
    assert 0.5 < masked < 0.9


def test_grid_stage_errors(tmp_path):
    ctx = context(tmp_path)
    ctx.table = ctx.table.drop(columns=["anomaly"])
    with pytest.raises(StageError, match="anomaly"):
        STAGE.run(ctx)
    with pytest.raises(ConfigError, match="grid.height"):  # refused when survey.toml is read
        context(tmp_path, height="high")


def test_grid_stage_micro_levelling(tmp_path):
    config = parse_config(
        {
            "survey": {"kind": "magnetic"},
            "level": {"micro_levelling": True},
            "grid": {"trial_depths": [4.5], "trial_dampings": [1e-2]},
        }
    )
    ctx = context(tmp_path)
    ctx.config = config
    # A 3 nT step on one line: a line-parallel corrugation that micro-levelling reduces
    # (Minty 1991, Exploration Geophysics 22:591).
    ctx.table.loc[ctx.table.line == "L005", "anomaly"] += 3.0
    out = STAGE.run(ctx)
    assert "micro_level_correction" in out.table and "anomaly_micro" in out.table
    assert out.state["column"] == "anomaly_micro"
    assert any("micro-levelled" in note for note in out.notes)
    line = out.table.line == "L005"
    assert out.table.loc[line, "micro_level_correction"].mean() < 0.0


def test_cv_window_keeps_a_central_square_of_blocks():
    from potfield.stages.grid import _cv_window

    e, n = np.meshgrid(np.arange(300.0), np.arange(200.0))
    e, n = e.ravel(), n.ravel()
    h = np.zeros_like(e)
    we, wn, _, wd = _cv_window(e, n, h, e + n, limit=400)
    assert wd.size == 400
    # a 20 x 20 square about the centre (149.5, 99.5): max-norm radius about 10 cells
    assert np.max(np.maximum(np.abs(we - 149.5), np.abs(wn - 99.5))) <= 11
    np.testing.assert_array_equal(wd, we + wn)  # rows stay together


def test_tiled_grid_agrees_with_whole(tmp_path):
    # Whole and tiled fits of the same survey (the blend is a partition of unity, tested in
    # tests/fields/test_tiles.py); both against the forward model (harmonica dipole).
    grid = {"trial_depths": [6.0], "trial_dampings": [1e-2], "height": 300.0, "method": "fft"}
    whole = STAGE.run(context(tmp_path / "a", **grid))
    tiled = STAGE.run(context(tmp_path / "b", tiled=True, tile_size_m=1500.0, **grid))
    assert tiled.state["model_path"] is None and tiled.metrics["grid_tiles"] >= 2
    a, b = whole.grids["anomaly"], tiled.grids["anomaly"]
    ee, nn = np.meshgrid(a.easting, a.northing)
    core = (ee > 300) & (ee < 2700) & (nn > 300) & (nn < 1700)
    diff = (b.values - a.values)[core]
    # bound 3 % of the field's spread: each tile sees less of the dipole's tails than the whole
    # fit, and the windows overlap by at least 2 source depths (Soler and Uieda 2021)
    assert np.sqrt(np.nanmean(diff**2)) < 0.03 * np.nanstd(a.values[core])
    # The blended model evaluated at every reading: residuals as small as the whole fit's
    # (the readings are an exact dipole field, so both are interpolation error only).
    rw = whole.table["grid_residual"].to_numpy(float)
    rt = tiled.table["grid_residual"].to_numpy(float)
    assert np.isfinite(rt).all()
    assert np.sqrt(np.mean(rt**2)) < 2.0 * np.sqrt(np.mean(rw**2)) + 1e-3 * np.nanstd(a.values)
    assert tiled.metrics["grid_residual_rms"] < 2.0 * whole.metrics["grid_residual_rms"] + 0.01
    assert tiled.metrics["grid_residual_rms_flagged"] == pytest.approx(500.0, rel=0.05)


def test_cv_blocks_are_one_line_spacing():
    # Common practice: hold out blocks about as large as the gaps the grid must bridge (the
    # line spacing for line surveys), at most a quarter of the survey so every fold has blocks.
    from potfield.stages.grid import _cv_spacing

    assert _cv_spacing(50.0, [125.0, 400.0], 200.0, 40_000.0) == 200.0
    assert _cv_spacing(50.0, [125.0, 400.0], None, 40_000.0) == 1200.0  # stations: 3 x depth
    assert _cv_spacing(50.0, [125.0], 200.0, 400.0) == 100.0


def test_station_survey_cell_from_station_spacing(tmp_path):
    # An invented scattered gravity station layout: a 16 x 16 lattice of 400 m rotated by 30 deg
    # and read in shuffled loop order (no lines), so the nearest-neighbour distance is 400 m by
    # construction; 40 stations are occupied twice (repeats, a few cm apart in the records).
    rng = np.random.default_rng(5)
    i, j = np.meshgrid(np.arange(16), np.arange(16))
    u, v = 400.0 * i.ravel(), 400.0 * j.ravel()
    c, s = np.cos(np.radians(30.0)), np.sin(np.radians(30.0))
    e, n = 10_000.0 + c * u - s * v, 20_000.0 + s * u + c * v
    repeat = rng.choice(e.size, 40, replace=False)
    e = np.r_[e, e[repeat] + 0.03]
    n = np.r_[n, n[repeat] - 0.02]
    order = rng.permutation(e.size)
    e, n = e[order], n[order]
    station = np.r_[np.arange(256), repeat][order]
    table = pd.DataFrame(
        {
            "easting": e,
            "northing": n,
            "height": 250.0 + rng.normal(0, 5, e.size),
            "line": [f"LOOP{k // 14}" for k in range(e.size)],
            "line_type": "traverse",
            "station": [f"G{k:03d}" for k in station],
        }
    )
    # a smooth anomaly of a buried sphere-like source (harmonica point mass, mGal)
    table["bouguer_anomaly"] = hm.point_gravity(
        (table.easting, table.northing, table.height), (13_000.0, 23_000.0, -1500.0), 5e11, field="g_z"
    )
    config = parse_config(
        {"survey": {"kind": "gravity"}, "grid": {"depth_factors": [4.5], "dampings": [1e-2]}}
    )
    # the ingest's "line spacing" of loop centroids means nothing for stations (12 m seen on a
    # real station survey): the grid must not use it
    state = {
        "ingest": {
            "line_spacing_m": 12.0,
            "tie_spacing_m": None,
            "crs": "EPSG:32633",
            "centroid": [15.0, 45.0],
        }
    }
    ctx = StageContext(config=config, survey=Survey(tmp_path), table=table, state=state)
    from potfield.stages.grid import STATION_CELL_FRACTION, _station_spacing

    assert _station_spacing(table, np.ones(len(table), bool)) == pytest.approx(400.0, abs=0.1)
    out = STAGE.run(ctx)
    grid = out.grids["bouguer_anomaly"]
    # common practice: a cell of a quarter to a half of the station spacing; here one half
    assert STATION_CELL_FRACTION == 0.5
    assert float(grid.easting[1] - grid.easting[0]) == pytest.approx(200.0, abs=0.1)  # region-adjusted
    assert out.state["spacing_m"] == pytest.approx(200.0, abs=0.1)
    # about (6000 m / 200 m + 1)^2 nodes over the rotated square's bounding box, not 10^5
    assert grid.size < 2000
    # the grid still honours the data: residual at the stations small against the anomaly
    res = out.table["grid_residual"].to_numpy()
    assert np.sqrt(np.mean(res**2)) < 0.05 * table["bouguer_anomaly"].std()


def test_station_pegs_along_lines_keep_the_line_spacing(tmp_path):
    # A magnetic line survey whose readings carry station (peg) numbers every 20 m along lines
    # 200 m apart: the lines rule (common practice: a quarter of the line spacing), not the pegs.
    ctx = context(tmp_path, depth_factors=[4.5], dampings=[1e-2])
    ctx.table["station"] = [f"P{k}" for k in range(len(ctx.table))]
    anomaly = STAGE.run(ctx).grids["anomaly"]
    assert float(anomaly.easting[1] - anomaly.easting[0]) == pytest.approx(50.0, abs=0.1)
