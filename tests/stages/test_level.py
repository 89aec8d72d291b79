"""Tests of the level stage (glue around potfield.fields.lines.leveling)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from potfield.config import parse_config
from potfield.errors import PotfieldError
from potfield.stages.base import StageContext
from potfield.stages.level import STAGE, micro_level_table, run
from potfield.survey import Survey


def dipole_tmi(east, north, up, source=(2000.0, 1100.0, -800.0), moment=2e9, inc=60.0):
    """Point-dipole total-field anomaly, magnetisation along the field (Blakely 1995, eq. 4.13)."""
    i = np.radians(inc)
    f = np.array([0.0, np.cos(i), -np.sin(i)])
    east, north, up = np.broadcast_arrays(
        np.asarray(east, float), np.asarray(north, float), np.asarray(up, float)
    )
    r = np.stack([east - source[0], north - source[1], up - source[2]])
    dist = np.sqrt((r**2).sum(axis=0))
    m = moment * f
    b = 1e-7 * (3 * np.tensordot(m, r, axes=1) * r / dist**5 - m[:, None] / dist**3) * 1e9
    return np.tensordot(f, b, axes=1)


def survey_table(seed=0, with_ties=True, noise=0.05, value="anomaly", short_line=False):
    """E-W traverse lines (200 m apart) and N-S tie lines (1 km apart) with per-line offsets."""
    rng = np.random.default_rng(seed)
    t0 = np.datetime64("2024-05-01T08:00:00", "ns")
    frames, clock = [], 0.0
    # flown back and forth (alternate lines westward), as surveys are
    specs = [
        (f"L{k:02d}", "traverse", np.arange(0.0, 4001.0, 10.0)[:: (-1) ** k], 100.0 + 200 * k)
        for k in range(12)
    ]
    if short_line:
        specs.append(("L99", "traverse", np.arange(250.0, 700.0, 10.0), 2500.0))
    for name, kind, x, y0 in specs:  # loop over lines
        frames.append(
            pd.DataFrame(
                {"line": name, "line_type": kind, "easting": x, "northing": y0 + 3.0 * np.sin(x / 300.0)}
            )
        )
    if with_ties:
        for k in range(4):
            y = np.arange(-100.0, 2601.0, 10.0)
            frames.append(
                pd.DataFrame(
                    {
                        "line": f"T{k}",
                        "line_type": "tie",
                        "easting": 300.0 + 1000 * k + 2.0 * np.cos(y / 250.0),
                        "northing": y,
                    }
                )
            )
    for f in frames:
        f["time"] = t0 + ((clock + np.arange(len(f)) * 0.2) * 1e9).astype("timedelta64[ns]")
        clock += len(f) * 0.2 + 60.0
    table = pd.concat(frames, ignore_index=True)
    table["height"] = 120.0
    truth = dipole_tmi(table["easting"].to_numpy(), table["northing"].to_numpy(), 120.0)
    offsets = {n: rng.normal(0, 4.0) for n in table["line"].unique()}
    table["truth"] = truth
    table[value] = truth + table["line"].map(offsets) + rng.normal(0, noise, len(table))
    table["flag_spike"] = False
    table = table.sort_values(["line", "time"], ignore_index=True)
    return table, offsets


def context(tmp_path, table, kind="magnetic", level=None):
    config = parse_config({"survey": {"kind": kind}, "level": level or {}})
    return StageContext(config=config, survey=Survey(tmp_path), table=table)


def test_stage_declaration():
    assert STAGE.name == "level" and STAGE.run is run
    assert STAGE.sections == ("level", "lines")


def test_level_stage_recovers_offsets(tmp_path):
    table, offsets = survey_table(seed=2)
    before_cols = table.copy()
    out = run(context(tmp_path, table))
    result = out.table
    assert len(result) == len(table)  # never drops a reading
    pd.testing.assert_frame_equal(result[before_cols.columns], before_cols)  # others untouched
    assert np.allclose(result["anomaly_levelled"], result["anomaly"] + result["level_correction"])
    err = (result["anomaly_levelled"] - result["truth"]).groupby(result["line"]).mean()
    tie_mean = np.mean([offsets[f"T{k}"] for k in range(4)])
    # Datum: mean tie correction 0, so every line ends at the mean tie offset; within 3 sigma of
    # one crossover misclosure (3 * sqrt(2) * 0.05 nT) against offsets of sd 4 nT.
    assert np.allclose(err, tie_mean, atol=3 * np.sqrt(2) * 0.05)
    m = out.metrics
    assert m["crossovers"] == 48 and m["crossovers_used"] == 48
    assert m["crossover_rms_ratio"] >= 5.0  # brief: at least 5x
    assert out.checks[0].passed and out.checks[0].unit == "nT"
    assert out.checks[0].tolerance == 1.0  # crossover_rms_nT default (common practice)
    cx = out.tables["crossovers"]
    for col in (
        "line",
        "tie",
        "easting",
        "northing",
        "time_line",
        "time_tie",
        "value_line",
        "value_tie",
        "difference",
        "height_line",
        "height_tie",
        "height_difference",
        "difference_levelled",
        "used",
        "flagged",
        "index_line",
        "index_tie",
    ):
        assert col in cx
    lines = out.tables["lines"]
    assert set(lines["line"]) == set(table["line"])
    assert (lines["crossover_rms_after"] < lines["crossover_rms_before"]).all()
    assert out.state["levelled"] and abs(np.mean(list(out.state["tie_corrections"].values()))) < 1e-9


def test_flagged_readings_are_not_used(tmp_path):
    table, _ = survey_table(seed=3)
    out0 = run(context(tmp_path, table))
    cx0 = out0.tables["crossovers"]
    first = cx0.iloc[0]
    table.loc[int(first["index_line"]), "flag_spike"] = True
    table.loc[int(first["index_line"]), "anomaly"] += 500.0  # a spike the clean stage flagged
    out = run(context(tmp_path, table))
    cx = out.tables["crossovers"]
    hit = (cx["line"] == first["line"]) & (cx["tie"] == first["tie"])
    assert cx.loc[hit, "flagged"].all() and not cx.loc[hit, "used"].any()
    # the spike does not reach the line's correction
    line = first["line"]
    c0 = out0.table.loc[out0.table["line"] == line, "level_correction"].iloc[0]
    c1 = out.table.loc[out.table["line"] == line, "level_correction"].iloc[0]
    assert abs(c1 - c0) < 0.2


def test_short_line_is_reported_and_kept(tmp_path):
    table, _ = survey_table(seed=4, short_line=True)
    out = run(context(tmp_path, table, level={"min_crossovers": 2, "neighbour_levelling": False}))
    lines = out.tables["lines"].set_index("line")
    assert lines.loc["L99", "crossovers"] == 1
    assert "min_crossovers" in lines.loc["L99", "warning"]
    assert (out.table.loc[out.table["line"] == "L99", "level_correction"] == 0).all()
    assert any("L99" in w for w in out.warnings)
    assert out.metrics["unlevelled_lines"] == 1 and out.state["unlevelled_lines"] == ["L99"]


def test_short_line_is_levelled_from_its_neighbours_in_time(tmp_path):
    table, _ = survey_table(seed=4, short_line=True)
    out = run(context(tmp_path, table, level={"min_crossovers": 2}))
    result = out.table
    # L99 is flown after L11 and before the ties: it takes L11's correction (the last levelled
    # traverse line before it; held constant after the last one). Common practice (Mauring et
    # al. 2002 level such lines from their neighbours).
    l11 = result.loc[result["line"] == "L11", "level_correction"].mean()
    l99 = result.loc[result["line"] == "L99", "level_correction"].to_numpy()
    assert l11 != 0 and np.allclose(l99, l11)
    assert out.metrics["neighbour_levelled_lines"] == 1 and out.metrics["unlevelled_lines"] == 0
    assert out.state["neighbour_levelled_lines"] == ["L99"]
    assert "neighbours" not in out.warnings[0] and "L99" in out.warnings[0]
    assert "levelled from the lines flown before and after" in out.warnings[0]
    lines = out.tables["lines"].set_index("line")
    assert "flown before and after" in lines.loc["L99", "warning"]


def test_linear_model_removes_drift(tmp_path):
    table, _ = survey_table(seed=5, noise=0.02)
    trav = table["line_type"] == "traverse"
    local = (table["time"] - table.groupby("line")["time"].transform("min")).dt.total_seconds()
    table.loc[trav, "anomaly"] += 0.01 * local[trav]  # 4 nT over a line (Yarger et al. 1978)
    const = run(context(tmp_path, table, level={"traverse_model": "constant"}))
    lin = run(context(tmp_path, table, level={"traverse_model": "linear"}))
    assert lin.metrics["crossover_rms_after"] < 0.5 * const.metrics["crossover_rms_after"]
    assert lin.metrics["crossover_rms_after"] < 0.1


def test_network_method_agrees_with_two_step(tmp_path):
    table, offsets = survey_table(seed=10)
    two = run(context(tmp_path, table))
    net = run(context(tmp_path, table, level={"method": "network"}))
    assert net.metrics["method"] == "network"
    assert net.metrics["crossover_rms_ratio"] >= 5.0
    # Both estimate the same line levels from the same crossovers: they agree within the noise
    # (3 sigma of one misclosure, 3 sqrt(2) 0.05 nT).
    diff = (net.table["level_correction"] - two.table["level_correction"]).groupby(table["line"]).mean()
    assert np.max(np.abs(diff - diff.mean())) < 3 * np.sqrt(2) * 0.05


def test_passthrough_without_ties(tmp_path):
    table, _ = survey_table(seed=6, with_ties=False)
    out = run(context(tmp_path, table))
    assert (out.table["level_correction"] == 0).all()
    assert np.array_equal(out.table["anomaly_levelled"], table["anomaly"])
    assert any("no tie lines" in n for n in out.notes)
    assert not out.checks


def test_gravity_levels_bouguer_anomaly(tmp_path):
    table, _ = survey_table(seed=7, value="bouguer_anomaly", noise=0.01)
    out = run(context(tmp_path, table, kind="gravity"))
    assert "anomaly_levelled" in out.table
    assert out.metrics["value_column"] == "bouguer_anomaly"
    assert out.checks[0].unit == "mGal"
    assert out.metrics["crossover_rms_ratio"] >= 5.0
    assert any("bouguer_anomaly" in n for n in out.notes)


def test_missing_value_column_is_a_one_line_error(tmp_path):
    table, _ = survey_table(seed=8)
    table = table.drop(columns="anomaly")
    with pytest.raises(PotfieldError) as err:
        run(context(tmp_path, table))
    text = str(err.value)
    assert "\n" not in text and "reference" in text and "anomaly" in text


def test_micro_level_table_removes_line_offsets(tmp_path):
    # Readings on E-W lines every 100 m; the grid between lines interpolates linearly in
    # northing (as a minimum-curvature-like gridding of lines would); offsets alternate in sign.
    rng = np.random.default_rng(9)
    spacing, cell = 100.0, 25.0
    east = np.arange(0.0, 6001.0, cell)
    north = np.arange(0.0, 6001.0, cell)
    line_y = np.arange(0.0, 6001.0, spacing)
    offset = rng.uniform(0.5, 1.5, line_y.size) * (-1.0) ** np.arange(line_y.size)
    ee, nn = np.meshgrid(east, north)
    field = lambda e, n: dipole_tmi(e, n, 100.0, source=(3000.0, 3000.0, -500.0), moment=5e8)
    grid_values = field(ee.ravel(), nn.ravel()).reshape(ee.shape) + np.interp(north, line_y, offset)[:, None]
    grid = xr.DataArray(
        grid_values, coords={"northing": north, "easting": east}, dims=("northing", "easting")
    )
    xr_, yr_ = np.meshgrid(np.arange(0.0, 6001.0, 10.0), line_y)
    table = pd.DataFrame(
        {
            "easting": xr_.ravel(),
            "northing": yr_.ravel(),
            "line": np.repeat([f"L{k}" for k in range(line_y.size)], xr_.shape[1]),
            "line_type": "traverse",
            "distance": np.tile(np.arange(0.0, 6001.0, 10.0), line_y.size),
        }
    )
    inject = np.repeat(offset, xr_.shape[1])
    cfg = parse_config(
        {"survey": {"kind": "magnetic"}, "level": {"micro_levelling": True, "micro_max_amplitude": 2.0}}
    ).level
    corr = micro_level_table(table, grid, spacing, cfg)
    assert corr.shape == (len(table),)
    assert np.max(np.abs(corr)) <= 2.0 + 1e-9
    core = (table["northing"].between(1000, 5000) & table["easting"].between(1000, 5000)).to_numpy()
    before = np.sqrt(np.mean(inject[core] ** 2))
    after = np.sqrt(np.mean((inject + corr)[core] ** 2))
    assert after < before / 2.5  # Minty (1991): corrugations removed
