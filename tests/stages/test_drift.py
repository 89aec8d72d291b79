"""Tests of the drift stage on small synthetic gravity tables built here.

Outside references: tidegravity (PyPI, an independent implementation of Longman 1959) for the
tide the synthetic meter sees; the hand arithmetic of the interval-table calibration (common
practice); the normal free-air gradient 0.3086 mGal/m (common practice); drift and network model
of Hinze, von Frese and Saad (2013).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import tidegravity
import tidegravity.tidegravity

from potfield.config import parse_config
from potfield.errors import ConfigError, InputDataError, PotfieldError
from potfield.stages.base import StageContext
from potfield.stages.drift import STAGE, run
from potfield.survey import Survey

LON, LAT = 147.30, -42.90
T0 = np.datetime64("2024-03-05T22:00:00", "ns")
TRUE_G = {"B": 980412.345, "S1": 980420.111, "S2": 980405.802, "S3": 980431.990, "S4": 980398.456}
# Two loops (one per day), base B at start, middle and end of each; every station twice.
PLAN = [
    ("L1", "B", 0.00),
    ("L1", "S1", 0.60),
    ("L1", "S2", 1.30),
    ("L1", "B", 2.00),
    ("L1", "S3", 2.70),
    ("L1", "S1", 3.40),
    ("L1", "S2", 4.00),
    ("L1", "B", 4.60),
    ("L2", "B", 24.00),
    ("L2", "S3", 24.50),
    ("L2", "S4", 25.20),
    ("L2", "B", 25.90),
    ("L2", "S4", 26.60),
    ("L2", "S3", 27.20),
    ("L2", "B", 27.80),
]
LEVEL = {"L1": 3000.0, "L2": 3004.25}  # reading level of each loop (mGal)
RATE = {"L1": 0.020, "L2": -0.015}  # mGal/h
TARE_H, TARE = 25.5, 0.120
INSTRUMENT_HEIGHT = 0.35


def at(hours):
    return T0 + np.round(np.asarray(hours, dtype=float) * 3.6e12).astype("timedelta64[ns]")


def tide_seen_by_meter(time, height):
    """Tide in the readings (mGal) from tidegravity, scaled to the gravimetric factor 1.16.

    tidegravity returns Longman's upward tidal acceleration times 1 + h2 - 1.5 k2 (= 1.1575 with
    its Love numbers): the correction to ADD (Longman 1959); the meter sees its negative.
    """
    _, _, g0 = tidegravity.solve_longman_tide(
        np.full(time.size, LAT),
        np.full(time.size, LON),
        np.asarray(height, float),
        np.array(pd.DatetimeIndex(time).to_pydatetime()),
    )
    return -np.asarray(g0) * 1.16 / tidegravity.tidegravity.love


def make_table(rate=RATE, tare=TARE, tide=True, quadratic=0.0):
    loop = np.array([p[0] for p in PLAN], dtype=object)
    station = np.array([p[1] for p in PLAN], dtype=object)
    hours = np.array([p[2] for p in PLAN])
    time = at(hours)
    t0 = {"L1": 0.0, "L2": 24.0}
    dt = np.array([h - t0[lp] for lp, h in zip(loop, hours)])
    height = np.full(len(PLAN), 35.0)
    g = np.array([TRUE_G[s] for s in station])
    reading = (
        g
        + np.array([LEVEL[lp] for lp in loop])
        + np.array([rate[lp] for lp in loop]) * dt
        + quadratic * dt**2
        + tare * (hours > TARE_H)
        - 0.3086 * INSTRUMENT_HEIGHT
    )  # sensor above the mark reads less (common practice)
    if tide:
        reading = reading + tide_seen_by_meter(time, height)
    return pd.DataFrame(
        {
            "time": time,
            "longitude": np.full(len(PLAN), LON),
            "latitude": np.full(len(PLAN), LAT),
            "height": height,
            "easting": np.zeros(len(PLAN)),
            "northing": np.zeros(len(PLAN)),
            "line": loop.copy(),
            "line_type": "traverse",
            "loop": loop.copy(),
            "source_file": "raw/loops.csv",
            "source_row": np.arange(2, len(PLAN) + 2),
            "station": station,
            "reading": reading,
            "instrument_height": np.full(len(PLAN), INSTRUMENT_HEIGHT),
        }
    )


def context(tmp_path, table, units=None, **drift):
    drift.setdefault("bases", [{"station": "B", "gravity": TRUE_G["B"]}])
    data = {"survey": {"kind": "gravity"}, "drift": drift}
    if units:
        data["input"] = {"units": units}
    return StageContext(config=parse_config(data), survey=Survey(tmp_path), table=table)


def true_gravity(table):
    return table["station"].map(TRUE_G).to_numpy()


# ------------------------------------------------------------------------------------------------
def test_network_recovers_drift_tare_and_tide(tmp_path):
    table = make_table()
    out = run(context(tmp_path, table, method="network", tares=["2024-03-06T23:30:00"]))
    t = out.table
    assert len(t) == len(table) and list(t.columns[: len(table.columns)]) == list(table.columns)
    pd.testing.assert_frame_equal(t[table.columns], table)  # input columns untouched
    # tide column = the correction added = tidegravity's value scaled to 1.16 (Longman 1959)
    np.testing.assert_allclose(
        t["tide"], -tide_seen_by_meter(table["time"].to_numpy(), table["height"]), atol=5e-4
    )
    assert np.ptp(t["tide"]) > 0.02  # the tide really was in the data
    # instrument height: +0.3086 mGal/m x 0.35 m (common practice)
    np.testing.assert_allclose(t["instrument_height_correction"], 0.3086 * 0.35, atol=1e-12)
    # gravity at every reading and every station recovered (Hinze et al. 2013 network model)
    np.testing.assert_allclose(t["gravity"], true_gravity(t), atol=5e-4)
    stations = out.tables["stations"].set_index("station")
    for s, g in TRUE_G.items():
        assert stations.loc[s, "gravity"] == pytest.approx(g, abs=5e-4)
    loops = out.tables["loops"].set_index("loop")
    for lp in ("L1", "L2"):
        assert loops.loc[lp, "drift_rate_mgal_per_h"] == pytest.approx(RATE[lp], abs=2e-4)
    assert out.tables["tares"]["step_mgal"].iloc[0] == pytest.approx(TARE, abs=5e-4)
    # the tare cuts L2 into two segments tied through S3, S4 and B (Hinze et al. 2013)
    assert list(out.tables["segments"]["segment"]) == ["L1", "L2#1", "L2#2"]
    assert all(c.passed for c in out.checks), [c.as_row() for c in out.checks]
    assert {c.name for c in out.checks} == {
        "gravity_drift_rate",
        "gravity_repeat_difference",
        "gravity_loop_closure",
    }
    assert out.state["bases"] == {"B": TRUE_G["B"]}


def test_network_exact_without_tide(tmp_path):
    table = make_table(tide=False)
    out = run(context(tmp_path, table, method="network", tide=False, tares=["2024-03-06T23:30:00"]))
    # noise-free synthetic, no tide: exact recovery of the model of Hinze et al. (2013)
    np.testing.assert_allclose(out.table["gravity"], true_gravity(out.table), atol=1e-6)
    np.testing.assert_allclose(out.table["drift_residual"], 0.0, atol=1e-6)
    assert (out.table["tide"] == 0).all()


@pytest.mark.parametrize("method", ["linear", "piecewise"])
def test_loop_methods_recover_linear_drift(tmp_path, method):
    table = make_table(tare=0.0, tide=False)
    out = run(context(tmp_path, table, method=method, tide=False))
    # Linear drift between base repeats (Hinze et al. 2013) is exact for a linear drift
    np.testing.assert_allclose(out.table["gravity"], true_gravity(out.table), atol=1e-8)
    loops = out.tables["loops"].set_index("loop")
    # hand check: L1 base misclosure = 0.020 mGal/h x 4.6 h = 0.092 mGal
    assert loops.loc["L1", "closure_mgal"] == pytest.approx(0.092, abs=1e-9)
    assert loops.loc["L2", "drift_rate_mgal_per_h"] == pytest.approx(-0.015, abs=1e-9)
    repeats = out.tables["repeats"].set_index("station")
    assert repeats.loc["S1", "range_mgal"] == pytest.approx(0.0, abs=1e-8)
    assert all(c.passed for c in out.checks)


def test_loop_tied_through_a_station_of_an_earlier_loop(tmp_path):
    # Loop L2 without the base: it opens and closes at S3 (drift base), which loop L1 tied to B.
    table = make_table(tare=0.0, tide=False)
    keep = ~((table["line"] == "L2") & (table["station"] == "B")).to_numpy()
    table = table[keep].reset_index(drop=True)
    out = run(context(tmp_path, table, method="linear", tide=False))
    np.testing.assert_allclose(out.table["gravity"], true_gravity(out.table), atol=1e-8)
    loops = out.tables["loops"].set_index("loop")
    assert loops.loc["L2", "drift_rate_mgal_per_h"] == pytest.approx(RATE["L2"], abs=1e-9)
    # when L2 shares no station with L1, nothing ties it to the base: an error naming the loop
    alone = table.copy()
    alone.loc[alone["line"] == "L2", "station"] += "x"
    for method in ("linear", "network"):
        with pytest.raises(InputDataError, match="loop.*L2"):
            run(context(tmp_path, alone, method=method, tide=False))


def test_checks_fail_when_drift_too_large(tmp_path):
    table = make_table(rate={"L1": 0.20, "L2": -0.015}, tare=0.0, tide=False)
    out = run(context(tmp_path, table, method="network", tide=False))
    checks = {c.name: c for c in out.checks}
    # spec 0.05 mGal/h (common practice) against a 0.20 mGal/h drift
    assert not checks["gravity_drift_rate"].passed
    assert checks["gravity_drift_rate"].value == pytest.approx(0.20, abs=1e-6)
    # a strongly curved drift leaves repeat differences above 0.03 mGal (common practice)
    out = run(
        context(tmp_path, make_table(tare=0.0, tide=False, quadratic=0.02), method="linear", tide=False)
    )
    checks = {c.name: c for c in out.checks}
    assert not checks["gravity_repeat_difference"].passed
    assert not checks["gravity_loop_closure"].passed
    # a spec override tightens the tolerance
    ctx = context(tmp_path, make_table(tare=0.0, tide=False), method="network", tide=False)
    ctx.spec["gravity_drift_rate_mgal_per_h"] = (0.01, "test spec")
    checks = {c.name: c for c in run(ctx).checks}
    assert not checks["gravity_drift_rate"].passed and checks["gravity_drift_rate"].source == "test spec"


def test_flagged_reading_is_kept_but_not_fitted(tmp_path):
    table = make_table(tare=0.0, tide=False)
    table["flag_spike"] = False
    table.loc[5, "reading"] += 5.0
    table.loc[5, "flag_spike"] = True
    out = run(context(tmp_path, table, method="network", tide=False))
    assert len(out.table) == len(table)
    assert out.table.loc[5, "gravity"] == pytest.approx(TRUE_G["S1"] + 5.0, abs=1e-6)
    assert out.tables["stations"].set_index("station").loc["S1", "gravity"] == pytest.approx(
        TRUE_G["S1"], abs=1e-6
    )


def test_counter_units_with_calibration_table(tmp_path):
    (tmp_path / "cal.csv").write_text(
        "counter,mgal,factor\n2000,2058.320,1.02935\n2100,2161.255,1.02940\n2200,2264.195,1.02948\n"
    )
    table = make_table(tare=0.0, tide=False).iloc[:4].copy()
    table["reading"] = [2045.67, 2100.0, 2199.99, 2045.67]
    out = run(
        context(
            tmp_path, table, units={"reading": "cu"}, method="linear", tide=False, calibration_file="cal.csv"
        )
    )
    # hand arithmetic (interval rule, common practice):
    # 2058.320 + 45.67 x 1.02935 = 2105.3304145; 2161.255 + 0 = 2161.255;
    # 2161.255 + 99.99 x 1.02940 = 2264.184706
    np.testing.assert_allclose(
        out.table["reading_mgal"], [2105.3304145, 2161.255, 2264.184706, 2105.3304145], atol=1e-9
    )
    assert STAGE.inputs(context(tmp_path, table, calibration_file="cal.csv").config, Survey(tmp_path)) == [
        tmp_path.resolve() / "cal.csv"
    ]
    table.loc[2, "reading"] = 2300.0
    with pytest.raises(InputDataError, match=r"raw/loops.csv row 4.*calibration table"):
        run(context(tmp_path, table, units={"reading": "cu"}, tide=False, calibration_file="cal.csv"))
    with pytest.raises(ConfigError, match="drift.calibration_file"):
        run(context(tmp_path, table, units={"reading": "cu"}, tide=False))
    # a malformed table names its file and line (header = line 1)
    (tmp_path / "bad.csv").write_text("counter,mgal,factor\n2000,2058.3,1.03\n1900,1955.0,1.03\n")
    with pytest.raises(InputDataError, match=r"bad.csv, row 3: .*increase"):
        run(context(tmp_path, table, units={"reading": "cu"}, tide=False, calibration_file="bad.csv"))


def test_configuration_errors_are_one_line(tmp_path):
    table = make_table(tide=False)
    with pytest.raises(ConfigError, match=r"\[\[drift.bases\]\]") as info:
        run(context(tmp_path, table, bases=[], tide=False))
    assert "\n" not in str(info.value)
    with pytest.raises(ConfigError, match=r"drift.bases\[1\].station.*'BX'"):
        run(
            context(
                tmp_path,
                table,
                tide=False,
                bases=[{"station": "B", "gravity": 1.0}, {"station": "BX", "gravity": 2.0}],
            )
        )
    with pytest.raises(ConfigError, match="drift.tares"):
        run(context(tmp_path, table, tide=False, tares=["yesterday"]))
    bad = table.copy()
    bad.loc[3, "station"] = None
    with pytest.raises(PotfieldError, match="raw/loops.csv row 5: station id is missing"):
        run(context(tmp_path, bad, tide=False))


def test_loop_rules_line_and_local_day(tmp_path):
    table = make_table(tare=0.0, tide=False).drop(columns="loop")
    # no loop column: local solar day at 147.3 E (UTC + 9.8 h), so L1 (22:00-02:36 UTC) stays
    # one loop although it crosses UTC midnight (a UTC-day rule would cut it in two)
    out = run(context(tmp_path, table, method="linear", tide=False))
    assert list(out.tables["loops"]["loop"]) == ["2024-03-06", "2024-03-07"]
    assert list(out.table["loop"][:8]) == ["2024-03-06"] * 8
    np.testing.assert_allclose(out.table["gravity"], true_gravity(out.table), atol=1e-8)
    out = run(context(tmp_path, table, method="linear", tide=False, loops="line"))
    assert list(out.tables["loops"]["loop"]) == ["L1", "L2"]
    with pytest.raises(ConfigError, match="drift.loops"):
        run(context(tmp_path, table, tide=False, loops="loop"))


def test_numeric_station_ids_and_flagged_out_of_table(tmp_path):
    table = make_table(tare=0.0, tide=False)
    ids = {"B": 100.0, "S1": 101.0, "S2": 102.0, "S3": 103.0, "S4": 104.0}
    table["station"] = table["station"].map(ids).astype(float)
    out = run(
        context(
            tmp_path, table, method="network", tide=False, bases=[{"station": 100, "gravity": TRUE_G["B"]}]
        )
    )
    st = out.tables["stations"].set_index("station")
    assert st.loc["103", "gravity"] == pytest.approx(TRUE_G["S3"], abs=1e-6)
    # a flagged reading outside the calibration table is left empty, not an error
    (tmp_path / "cal.csv").write_text("counter,mgal,factor\n0,0,1.0\n9000,9000,1.0\n")
    table = make_table(tare=0.0, tide=False)
    table["reading"] -= 980000.0  # bring the readings into the 0..9000 counter range
    table["flag_spike"] = False
    table.loc[5, ["reading", "flag_spike"]] = [9500.0, True]
    out = run(
        context(
            tmp_path,
            table,
            units={"reading": "cu"},
            method="linear",
            tide=False,
            calibration_file="cal.csv",
            bases=[{"station": "B", "gravity": TRUE_G["B"] - 980000.0}],
        )
    )
    assert np.isnan(out.table.loc[5, "gravity"]) and any("calibration" in w for w in out.warnings)
    np.testing.assert_allclose(
        out.table["gravity"].drop(index=5),
        true_gravity(out.table)[np.arange(len(table)) != 5] - 980000.0,
        atol=1e-8,
    )


def test_stage_definition():
    assert STAGE.name == "drift"
    assert STAGE.sections == ("drift",)
    assert STAGE.kinds == ("gravity",)


def test_dial_jump_stops_the_stage_with_the_tare_to_add(tmp_path):
    table = make_table(tare=0.0, tide=False)
    # a 30 mGal range (dial) change in loop L1 between S2 (1.30 h) and B (2.00 h); B is read at
    # 0.00, 2.00 and 4.60 h, so the jump shows between its first two readings, and S1 and S2
    # (read before and after it) narrow it to 1.30-2.00 h
    table.loc[3:7, "reading"] += 30.0
    with pytest.raises(InputDataError) as info:
        run(context(tmp_path, table, method="network", tide=False))
    text = str(info.value)
    # jump plus 2 h of drift at 0.020 mGal/h: +30.040 mGal (hand arithmetic)
    assert "+30.040 mGal" in text and "station B" in text and "\n" not in text
    # proposed tare: the middle of 1.30-2.00 h = 1.65 h after 22:00 = 23:39
    assert "[drift] tares" in text and "proposed: '2024-03-05T23:39:00Z'" in text
    # given the tare at the jump time, the adjustment recovers every station (Hinze et al. 2013)
    out = run(context(tmp_path, table, method="network", tide=False, tares=["2024-03-05T23:40:00"]))
    np.testing.assert_allclose(out.table["gravity"], true_gravity(out.table), atol=1e-6)
