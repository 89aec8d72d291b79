"""The clean stage on invented tables (no pipeline run): spike test scaled to the line's own
roughness, the cap on the flagged fraction, and the observatory first-difference test."""

from __future__ import annotations

import numpy as np
import pandas as pd

from potfield.config import parse_config
from potfield.fields.lines.noise import fourth_difference
from potfield.stages.base import StageContext
from potfield.stages.clean import STAGE
from potfield.survey import Survey


def _ctx(tmp_path, table, kind="magnetic", clean=None):
    data = {"survey": {"name": "t", "kind": kind}}
    if clean:
        data["clean"] = clean
    return StageContext(
        config=parse_config(data), survey=Survey(tmp_path), table=table, state={}, grids={}, spec={}
    )


def _coarse_survey(spacing=50.0, n_lines=10, seed=0):
    """Invented lines sampled every ``spacing`` m over buried vertical dipoles (peak 50-800 nT;
    vertical dipole at the pole, Blakely 1995, ch. 4) with 0.05 nT noise."""
    rng = np.random.default_rng(seed)
    x = np.arange(0.0, 20_000.0, spacing)
    t0 = np.datetime64("2024-05-01T08:00:00", "ns")
    frames = []
    for k in range(n_lines):
        v = rng.normal(0, 0.05, x.size)
        for _ in range(8):
            x0, z, amp = rng.uniform(0, 20_000), rng.uniform(150, 450), rng.uniform(50, 800)
            v += amp * z**3 / 2 * (2 * z**2 - (x - x0) ** 2) / ((x - x0) ** 2 + z**2) ** 2.5
        frames.append(
            pd.DataFrame(
                {
                    "line": f"L{k:02d}",
                    "line_type": "traverse",
                    "distance": x,
                    "easting": x,
                    "northing": 500.0 * k,
                    "height": 100.0,
                    "total_field": 50_000.0 + v,
                    "time": t0 + np.timedelta64(3600 * k, "s") + (x / 50.0 * 1e9).astype("timedelta64[ns]"),
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


def test_coarse_survey_flags_few_and_finds_the_spikes(tmp_path):
    table = _coarse_survey()
    # five spikes where the geology is smooth at this sampling: the fourth difference of the
    # geology below 5 nT within 8 samples (a smaller spike beside rough geology cannot be told
    # from it)
    groups = pd.factorize(table["line"])[0]
    d4 = pd.Series(np.abs(fourth_difference(table["total_field"].to_numpy(), groups)))
    smooth = np.flatnonzero(d4.rolling(17, center=True).max().to_numpy() < 5.0)
    idx = np.sort(np.random.default_rng(5).choice(smooth, 5, replace=False))
    table.loc[idx, "total_field"] += [12.0, -9.0, 15.0, 20.0, -11.0]
    out = STAGE.run(_ctx(tmp_path, table))
    flags = out.table["flag_spike"].to_numpy()
    # all five found; fourth difference of a spike peaks at its own sample (A x (1, -4, 6, -4, 1),
    # references.md, common practice)
    assert set(idx) <= set(np.flatnonzero(flags))
    assert flags.mean() < 0.005  # the rolling-median test before flagged 18.3 % of this survey
    assert out.metrics["spike_fraction"] < 0.005 and not out.warnings


def test_flagged_fraction_is_capped_with_a_warning(tmp_path):
    table = _coarse_survey()
    rng = np.random.default_rng(1)
    idx = rng.choice(np.arange(10, len(table) - 10), 200, replace=False)
    table.loc[idx, "total_field"] += rng.choice([-1, 1], idx.size) * rng.uniform(5, 50, idx.size)
    out = STAGE.run(_ctx(tmp_path, table, clean={"max_spike_fraction": 0.005}))
    flags = out.table["flag_spike"].to_numpy()
    assert flags.sum() == int(0.005 * len(table))
    assert out.metrics["spikes_found_total_field"] > flags.sum()
    assert any("max_spike_fraction" in w for w in out.warnings)


def test_observatory_minutes_use_first_differences(tmp_path):
    rng = np.random.default_rng(0)
    t = np.arange(2 * 1440)
    times = np.datetime64("2025-05-10T00:00", "ns") + t * np.timedelta64(60, "s")
    frames = []
    for s, code in enumerate(["AAA", "BBB", "CCC"]):
        day = np.clip(np.sin(2 * np.pi * t / 1440 + s), 0, None)
        frame = {"line": code, "station": code, "line_type": "traverse", "time": times}
        for c in ("mag_north", "mag_east", "mag_down", "total_field"):
            walk = np.cumsum(rng.standard_t(3, t.size) * (0.05 + 0.3 * day))
            frame[c] = np.round(20 * day**2 + walk, 1)
        frames.append(pd.DataFrame(frame))
    table = pd.concat(frames, ignore_index=True)
    table.loc[[100, 3000, 5000], "mag_down"] += [40.0, -25.0, 30.0]
    out = STAGE.run(_ctx(tmp_path, table, kind="observatory"))
    flags = out.table["flag_spike"].to_numpy()
    assert {100, 3000, 5000} <= set(np.flatnonzero(flags))
    assert flags.mean() < 0.01  # quiet invented minutes: < 1 % flagged (common practice)
