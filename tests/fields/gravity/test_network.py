"""Tests of potfield.fields.gravity.network: calibration, instrument height, loop drift, network adjustment.

Outside references used: hand arithmetic of the interval-table rule (common practice for spring
gravimeters), the normal free-air gradient from boule's closed-form normal gravity (Li and Goetze
2001), hand-computed linear/piecewise drift (Hinze, von Frese and Saad 2013), and an independent
least-squares solution with plain numpy (numpy.linalg.lstsq on an explicitly built design matrix).
"""

from __future__ import annotations

import boule
import numpy as np
import pandas as pd
import pytest

from potfield.fields.errors import FieldError
from potfield.fields.gravity import network as gn

T0 = np.datetime64("2024-03-05T08:00:00", "ns")


def at(hours):
    """datetime64 times ``hours`` after T0."""
    return T0 + np.round(np.asarray(hours, dtype=float) * 3.6e12).astype("timedelta64[ns]")


# ------------------------------------------------------------------------------------------------
# calibration
# ------------------------------------------------------------------------------------------------
CAL = pd.DataFrame(
    {
        "counter": [2000.0, 2100.0, 2200.0],
        "mgal": [2058.320, 2161.255, 2264.195],
        "factor": [1.02935, 1.02940, 1.02948],
    }
)


def test_calibration_hand_computed():
    out = gn.apply_calibration([2045.67, 2100.0, 2199.99, 2200.0, np.nan], CAL)
    # Interval-table rule (common practice): mGal = M_i + (c - C_i) * F_i
    # 2045.67: 2058.320 + 45.67 * 1.02935 = 2058.320 + 47.0104145 = 2105.3304145
    assert out[0] == pytest.approx(2105.3304145, abs=1e-9)
    # 2100.00 starts the second interval: 2161.255 + 0 * 1.02940 = 2161.255
    assert out[1] == pytest.approx(2161.255, abs=1e-9)
    # 2199.99: 2161.255 + 99.99 * 1.02940 = 2161.255 + 102.929706 = 2264.184706
    assert out[2] == pytest.approx(2264.184706, abs=1e-9)
    # the last tabulated counter gives its tabulated value
    assert out[3] == pytest.approx(2264.195, abs=1e-9)
    assert np.isnan(out[4])


def test_calibration_out_of_table_and_bad_table():
    with pytest.raises(gn.CalibrationRangeError) as info:
        gn.apply_calibration([2050.0, 1999.9, 2300.0], CAL)
    assert isinstance(info.value, FieldError)
    assert list(info.value.positions) == [1, 2]
    bad = CAL.copy()
    bad.loc[2, "counter"] = 2050.0
    with pytest.raises(gn.CalibrationTableError) as info:
        gn.apply_calibration([2010.0], bad)
    assert info.value.table_row == 3
    with pytest.raises(gn.CalibrationTableError):
        gn.apply_calibration([2010.0], CAL.drop(columns="factor"))


# ------------------------------------------------------------------------------------------------
# instrument height
# ------------------------------------------------------------------------------------------------
def test_instrument_height_against_normal_gradient():
    h = np.array([0.0, 0.25, 1.25, -0.5])
    corr = gn.instrument_height_correction(h)
    # common practice: +0.3086 mGal/m x h, added (sensor above the mark reads less)
    np.testing.assert_allclose(corr, 0.3086 * h, rtol=0, atol=1e-12)
    # boule (Li and Goetze 2001 closed form): gravity at the mark minus gravity at the sensor
    # 1.25 m above it, at 45 deg latitude, is the correction to add.
    gamma = boule.WGS84.normal_gravity((None, np.array([45.0, 45.0]), np.array([100.0, 101.25])))
    assert corr[2] == pytest.approx(gamma[0] - gamma[1], abs=2e-4)
    assert corr[2] > 0


# ------------------------------------------------------------------------------------------------
# loop drift
# ------------------------------------------------------------------------------------------------
def test_linear_loop_drift_hand_computed():
    # Loop A: base B at 08:00 (1000.000) and 10:00 (1000.100); S1 at 09:30.
    # Loop C: base B at 12:00 (1000.500) and 13:00 (1000.480); S2 at 12:15.
    hours = [0.0, 1.5, 2.0, 4.0, 4.25, 5.0]
    value = [1000.000, 1003.275, 1000.100, 1000.500, 999.000, 1000.480]
    is_base = [True, False, True, True, False, True]
    loop = ["A", "A", "A", "C", "C", "C"]
    res = gn.loop_drift(at(hours), value, is_base, loop, method="linear")
    # Hand computation (Hinze et al. 2013, linear drift between base readings):
    # A: rate = (1000.100 - 1000.000) / 2 h = 0.05 mGal/h; at 09:30 drift = 0.05 * 1.5 = 0.075
    # C: rate = (1000.480 - 1000.500) / 1 h = -0.02 mGal/h; at 12:15 drift = -0.02 * 0.25 = -0.005
    np.testing.assert_allclose(res.drift, [0.0, 0.075, 0.100, 0.0, -0.005, -0.020], atol=1e-9)
    loops = res.loops.set_index("loop")
    assert loops.loc["A", "drift_rate_mgal_per_h"] == pytest.approx(0.05, abs=1e-9)
    assert loops.loc["C", "drift_rate_mgal_per_h"] == pytest.approx(-0.02, abs=1e-9)
    assert loops.loc["A", "closure_mgal"] == pytest.approx(0.100, abs=1e-9)
    assert loops.loc["A", "hours"] == pytest.approx(2.0)
    # S1 drift-corrected and tied to B = 1000.000: 1003.275 - 0.075 - 1000.000 + 1000.000
    g = np.asarray(value) - res.drift - res.offset
    assert g[1] == pytest.approx(3.200, abs=1e-9)
    assert g[4] == pytest.approx(-1.495, abs=1e-9)  # 999.000 + 0.005 - 1000.500


def test_piecewise_loop_drift_hand_computed():
    # Base at 08:00 (50.000), 09:00 (50.080), 11:00 (50.100); stations at 07:30, 10:00, 12:00.
    hours = [-0.5, 0.0, 1.0, 2.0, 3.0, 4.0]
    value = [0.0, 50.000, 50.080, 0.0, 50.100, 0.0]
    is_base = [False, True, True, False, True, False]
    pw = gn.loop_drift(at(hours), value, is_base, ["L"] * 6, method="piecewise")
    # Hand computation: segments 0.080 mGal/h (08-09 h) then 0.010 mGal/h (09-11 h);
    # 07:30 extrapolates the first segment: -0.5 * 0.08 = -0.040
    # 10:00: 0.080 + 1 * 0.010 = 0.090; 12:00 extrapolates the last: 0.100 + 1 * 0.010 = 0.110
    np.testing.assert_allclose(pw.drift, [-0.040, 0.0, 0.080, 0.090, 0.100, 0.110], atol=1e-9)
    row = pw.loops.iloc[0]
    assert row["max_segment_rate_mgal_per_h"] == pytest.approx(0.08, abs=1e-9)
    assert row["max_base_residual_mgal"] == pytest.approx(0.0, abs=1e-12)
    assert row["base_differences_mgal"] == "+0.0800 +0.0200"
    lin = gn.loop_drift(at(hours), value, is_base, ["L"] * 6, method="linear")
    # linear: rate = 0.100 / 3 h; the 09:00 base repeat departs by 0.080 - 0.100/3 = 0.046667
    assert lin.loops.iloc[0]["drift_rate_mgal_per_h"] == pytest.approx(0.1 / 3, abs=1e-12)
    assert lin.loops.iloc[0]["max_base_residual_mgal"] == pytest.approx(0.08 - 0.1 / 3, abs=1e-9)


def test_loop_drift_two_bases_and_missing_base():
    # Open at base P (g = 10.000), close at base Q (g = 12.500): 2 h, reading level 500.
    # Hand computation: P read 510.000 at 0 h, Q read 512.560 at 2 h -> misclosure
    # (512.560 - 12.500) - (510.000 - 10.000) = 0.060 -> 0.030 mGal/h.
    res = gn.loop_drift(
        at([0, 1, 2, 0, 1]),
        [510.0, 511.0, 512.56, 1.0, 2.0],
        [True, False, True, False, False],
        ["a", "a", "a", "b", "b"],
        base_value=[10.0, 0.0, 12.5, 0.0, 0.0],
    )
    assert res.loops.iloc[0]["drift_rate_mgal_per_h"] == pytest.approx(0.03, abs=1e-9)
    assert res.drift[1] == pytest.approx(0.03, abs=1e-9)
    assert res.offset[0] == pytest.approx(500.0)
    # loop b has no base reading: NaN drift, reported with zero base readings
    assert np.isnan(res.drift[3:]).all()
    assert res.loops.iloc[1]["base_readings"] == 0


# ------------------------------------------------------------------------------------------------
# network adjustment
# ------------------------------------------------------------------------------------------------
TRUE_G = {"B": 979800.000, "S1": 979801.234, "S2": 979799.500, "S3": 979802.750, "S4": 979800.600}
STATIONS = ["B", "S1", "S2", "B", "S3", "S1", "B", "B", "S2", "S4", "S3", "B", "S4", "B"]
HOURS = np.array([0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 24, 24.4, 24.9, 25.3, 25.8, 26.1, 26.5])
LOOPS = ["L1"] * 7 + ["L2"] * 7
OFFSET = {"L1": 3000.0, "L2": 3002.5}
RATE = {"L1": 0.04, "L2": -0.03}
LOOP_T0 = {"L1": 0.0, "L2": 24.0}
TARE_H, TARE = 25.0, 0.35


def synthetic(noise=None):
    value = np.array(
        [
            TRUE_G[s] + OFFSET[lp] + RATE[lp] * (h - LOOP_T0[lp]) + TARE * (h > TARE_H)
            for s, lp, h in zip(STATIONS, LOOPS, HOURS)
        ]
    )
    if noise is not None:
        value = value + noise
    return value


def numpy_design(fixed_base="B"):
    """Explicit design matrix: unknowns S1..S4, offset L1, L2, drift L1, L2, tare."""
    free = [s for s in sorted(TRUE_G) if s != fixed_base]
    A = np.zeros((len(STATIONS), len(free) + 5))
    for i, (s, lp, h) in enumerate(zip(STATIONS, LOOPS, HOURS)):
        if s != fixed_base:
            A[i, free.index(s)] = 1.0
        k = 0 if lp == "L1" else 1
        A[i, len(free) + k] = 1.0
        A[i, len(free) + 2 + k] = h - LOOP_T0[lp]
        A[i, len(free) + 4] = 1.0 if h > TARE_H else 0.0
    return A, free


def test_network_exact_recovery_and_numpy_lstsq():
    value = synthetic()
    res = gn.network_adjustment(STATIONS, at(HOURS), value, LOOPS, {"B": TRUE_G["B"]}, tares=[at(TARE_H)])
    # exact recovery of the noise-free synthetic truth
    for s, g in TRUE_G.items():
        assert res.stations.loc[s, "gravity"] == pytest.approx(g, abs=1e-6)
    loops = res.loops.set_index("loop")
    for lp in ("L1", "L2"):
        assert loops.loc[lp, "drift_rate_mgal_per_h"] == pytest.approx(RATE[lp], abs=1e-7)
        assert loops.loc[lp, "offset_mgal"] == pytest.approx(OFFSET[lp], abs=1e-6)
    assert res.tares["step_mgal"].iloc[0] == pytest.approx(TARE, abs=1e-7)
    assert np.nanmax(np.abs(res.residuals)) < 1e-6
    assert res.dof == len(STATIONS) - 9
    # independent solution: numpy.linalg.lstsq on the explicit design matrix
    A, free = numpy_design()
    x, *_ = np.linalg.lstsq(A, value - np.where(np.array(STATIONS) == "B", TRUE_G["B"], 0.0), rcond=None)
    np.testing.assert_allclose(res.stations.loc[free, "gravity"], x[:4], atol=1e-6)
    np.testing.assert_allclose(loops["offset_mgal"], x[4:6], atol=1e-6)
    np.testing.assert_allclose(loops["drift_rate_mgal_per_h"], x[6:8], atol=1e-7)
    # the drift column is the time-varying part: rate (t - t0) + tare step
    expect = np.array([RATE[lp] * (h - LOOP_T0[lp]) + TARE * (h > TARE_H) for lp, h in zip(LOOPS, HOURS)])
    np.testing.assert_allclose(res.drift, expect, atol=1e-7)


def test_network_noisy_matches_numpy_weighted_lstsq():
    rng = np.random.default_rng(7)
    noise = rng.normal(0.0, 0.01, len(STATIONS))
    value = synthetic(noise)
    sigma = np.where(np.array(STATIONS) == "B", 0.005, 0.01)
    res = gn.network_adjustment(
        STATIONS, at(HOURS), value, LOOPS, {"B": TRUE_G["B"]}, tares=[at(TARE_H)], reading_sigma=sigma
    )
    # independent weighted solution: rows scaled by 1/sigma, numpy.linalg.lstsq
    A, free = numpy_design()
    y = value - np.where(np.array(STATIONS) == "B", TRUE_G["B"], 0.0)
    Aw, yw = A / sigma[:, None], y / sigma
    x, *_ = np.linalg.lstsq(Aw, yw, rcond=None)
    v = yw - Aw @ x
    dof = A.shape[0] - A.shape[1]
    s0 = np.sqrt(v @ v / dof)
    sd = s0 * np.sqrt(np.diag(np.linalg.inv(Aw.T @ Aw)))
    np.testing.assert_allclose(res.stations.loc[free, "gravity"], x[:4], atol=1e-8)
    np.testing.assert_allclose(res.stations.loc[free, "sigma_mgal"], sd[:4], rtol=1e-6)
    np.testing.assert_allclose(res.tares["sigma_mgal"].iloc[0], sd[8], rtol=1e-6)
    assert res.sigma0 == pytest.approx(s0, rel=1e-8)
    np.testing.assert_allclose(res.residuals, y - A @ x, atol=1e-8)


def test_network_weighted_bases():
    rng = np.random.default_rng(3)
    value = synthetic(rng.normal(0.0, 0.01, len(STATIONS)))
    bases = {"B": (TRUE_G["B"], 0.02), "S4": (TRUE_G["S4"] + 0.01, 0.02)}
    dense = gn.network_adjustment(STATIONS, at(HOURS), value, LOOPS, bases, tares=[at(TARE_H)])
    # independent: both bases as weighted pseudo-observations, all five stations unknown
    names = sorted(TRUE_G)
    A = np.zeros((len(STATIONS) + 2, 10))
    for i, (s, lp, h) in enumerate(zip(STATIONS, LOOPS, HOURS)):
        k = 0 if lp == "L1" else 1
        A[i, names.index(s)] = 1.0
        A[i, 5 + k] = 1.0
        A[i, 7 + k] = h - LOOP_T0[lp]
        A[i, 9] = float(h > TARE_H)
    A[-2, names.index("B")] = 1.0
    A[-1, names.index("S4")] = 1.0
    y = np.concatenate([value, [bases["B"][0], bases["S4"][0]]])
    sig = np.concatenate([np.full(len(STATIONS), 0.01), [0.02, 0.02]])
    x, *_ = np.linalg.lstsq(A / sig[:, None], y / sig, rcond=None)
    np.testing.assert_allclose(dense.stations.loc[names, "gravity"], x[:5], atol=1e-8)
    assert not dense.stations["fixed"].any()


def test_network_larger_random_network_matches_numpy_lstsq():
    # 12 loops over 80 stations (overlapping), each loop opening, splitting and closing at base
    # "B0"; weighted least squares solved independently with numpy.linalg.lstsq on the full
    # explicit design matrix, including the station standard deviations.
    rng = np.random.default_rng(11)
    n_loop, per = 12, 12
    names, loops, hours = [], [], []
    for k in range(n_loop):
        pool = [f"S{j}" for j in range(k * 6, k * 6 + per)]
        seq = ["B0"] + pool[:6] + ["B0"] + pool[6:] + list(rng.choice(pool, 4, replace=False)) + ["B0"]
        names += seq
        loops += [f"L{k}"] * len(seq)
        hours += list(24.0 * k + 0.15 * np.arange(len(seq)))
    names, hours = np.array(names), np.array(hours)
    truth = {s: rng.normal(0, 30) for s in np.unique(names)}
    truth["B0"] = 0.0
    level = rng.normal(2000, 5, n_loop)
    rate = rng.normal(0, 0.03, n_loop)
    k_of = np.array([int(lp[1:]) for lp in loops])
    value = (
        np.array([truth[s] for s in names])
        + level[k_of]
        + rate[k_of] * (hours - 24.0 * k_of)
        + rng.normal(0, 0.01, names.size)
    )
    res = gn.network_adjustment(names, at(hours), value, loops, {"B0": 0.0})
    free = sorted(s for s in truth if s != "B0")
    A = np.zeros((names.size, len(free) + 2 * n_loop))
    A[np.arange(names.size)[names != "B0"], [free.index(s) for s in names[names != "B0"]]] = 1.0
    A[np.arange(names.size), len(free) + k_of] = 1.0
    A[np.arange(names.size), len(free) + n_loop + k_of] = hours - 24.0 * k_of
    x, *_ = np.linalg.lstsq(A, value, rcond=None)
    v = value - A @ x
    s0 = np.sqrt(v @ v / (A.shape[0] - A.shape[1]))
    # uniform weights 1/0.01^2 cancel in sigma0^2 (A^T W A)^-1 = s0^2 (A^T A)^-1
    sd = s0 * np.sqrt(np.diag(np.linalg.inv(A.T @ A)))
    np.testing.assert_allclose(res.stations.loc[free, "gravity"], x[: len(free)], atol=1e-8)
    np.testing.assert_allclose(res.stations.loc[free, "sigma_mgal"], sd[: len(free)], rtol=1e-6)
    np.testing.assert_allclose(res.loops["drift_rate_mgal_per_h"], x[len(free) + n_loop :], atol=1e-9)
    assert res.sigma0 == pytest.approx(s0 / 0.01, rel=1e-8)


def test_network_failures_are_named():
    value = synthetic()
    with pytest.raises(gn.NetworkError, match="base 'X'"):
        gn.network_adjustment(STATIONS, at(HOURS), value, LOOPS, {"X": 1.0})
    # loop L2 tied to nothing when it shares no station with L1 and has no base
    st = [s if lp == "L1" else s + "b" for s, lp in zip(STATIONS, LOOPS)]
    with pytest.raises(gn.NetworkError, match="L2"):
        gn.network_adjustment(st, at(HOURS), value, LOOPS, {"B": 0.0})
    # a loop whose stations are each read once cannot give its drift: the error names it
    st = ["B", "S1", "S2", "B"] + ["B", "S3", "S4"]
    with pytest.raises(gn.NetworkError, match="loop L2 drift"):
        gn.network_adjustment(
            st, at([0, 1, 2, 3, 24, 25, 26]), np.zeros(7), ["L1"] * 4 + ["L2"] * 3, {"B": 0.0}
        )


def test_network_tare_between_loops_not_estimated():
    value = synthetic()
    res = gn.network_adjustment(
        STATIONS, at(HOURS), value, LOOPS, {"B": TRUE_G["B"]}, tares=[at(TARE_H), at(12.0)]
    )
    assert list(res.tares["estimated"]) == [True, False]
    assert any("between loops" in w for w in res.warnings)
    assert res.stations.loc["S3", "gravity"] == pytest.approx(TRUE_G["S3"], abs=1e-6)
    # ignoring the real tare leaves residuals: the check can fail
    res = gn.network_adjustment(STATIONS, at(HOURS), value, LOOPS, {"B": TRUE_G["B"]})
    assert np.nanmax(np.abs(res.residuals)) > 0.05


# ------------------------------------------------------------------------------------------------
# tares cut the meter's record into segments tied through shared stations
# ------------------------------------------------------------------------------------------------
SEG_G = {
    "B": 979800.000,
    "S1": 979801.234,
    "S2": 979799.500,
    "S3": 979802.750,
    "S4": 979800.600,
    "S5": 979803.125,
    "S6": 979798.870,
    "S7": 979800.015,
    "S8": 979804.440,
    "S9": 979797.333,
}
# Loop L1 opens and closes at base B. Loop L2 opens at B; a tare at 25.3 h; the crew rereads S7
# and S6 and ends the day at stations of L1 (S4, S5) without coming back to B: no base repeat
# spans the tare, only the shared stations tie the segment after it.
SEG_PLAN = [
    ("L1", "B", 0.0),
    ("L1", "S1", 0.4),
    ("L1", "S2", 0.8),
    ("L1", "S3", 1.2),
    ("L1", "B", 1.6),
    ("L1", "S4", 2.1),
    ("L1", "S5", 2.4),
    ("L1", "B", 2.8),
    ("L2", "B", 24.0),
    ("L2", "S1", 24.3),
    ("L2", "S6", 24.7),
    ("L2", "S7", 25.1),
    ("L2", "S7", 25.5),
    ("L2", "S6", 25.8),
    ("L2", "S8", 26.2),
    ("L2", "S4", 26.6),
    ("L2", "S9", 27.0),
    ("L2", "S5", 27.4),
    ("L2", "S8", 27.7),
]
SEG_T0 = {"L1": 0.0, "L2": 24.0}
SEG_LEVEL = {"L1": 2500.0, "L2": 2503.75}
SEG_RATE = {"L1": 0.035, "L2": -0.02}
SEG_TARE_H, SEG_TARE = 25.3, -0.42


def segment_survey(rate_after=None):
    """Noise-free readings of SEG_PLAN: truth + level + linear drift + the tare step (Hinze, von
    Frese and Saad 2013 observation equation). ``rate_after``: L2's drift rate after the tare
    (default: unchanged), counted from the tare time."""
    loop = np.array([p[0] for p in SEG_PLAN])
    station = np.array([p[1] for p in SEG_PLAN])
    hours = np.array([p[2] for p in SEG_PLAN])
    value = np.array([SEG_G[s] for s in station]) + np.array([SEG_LEVEL[lp] for lp in loop])
    rate = np.array([SEG_RATE[lp] for lp in loop])
    t0 = np.array([SEG_T0[lp] for lp in loop])
    after = hours > SEG_TARE_H
    if rate_after is None:
        value += rate * (hours - t0) + SEG_TARE * after
    else:
        value += np.where(
            after,
            rate * (SEG_TARE_H - t0) + rate_after * (hours - SEG_TARE_H) + SEG_TARE,
            rate * (hours - t0),
        )
    return station, at(hours), value, loop, hours


def test_tare_not_spanned_by_a_base_repeat_tied_through_shared_stations():
    station, time, value, loop, hours = segment_survey()
    res = gn.network_adjustment(station, time, value, loop, {"B": SEG_G["B"]}, tares=[at(SEG_TARE_H)])
    # analytic truth of the synthetic network: every station to 0.001 mGal
    for s, g in SEG_G.items():
        assert res.stations.loc[s, "gravity"] == pytest.approx(g, abs=1e-3)
    tare = res.tares.iloc[0]
    assert tare["loop"] == "L2" and tare["estimated"]
    assert tare["step_mgal"] == pytest.approx(SEG_TARE, abs=1e-3)
    seg = res.segments.set_index("segment")
    assert list(seg.index) == ["L1", "L2#1", "L2#2"]
    assert seg.loc["L2#2", "offset_mgal"] - seg.loc["L2#1", "offset_mgal"] == pytest.approx(
        SEG_TARE, abs=1e-6
    )
    # value - drift - offset is gravity at the mark at every reading
    np.testing.assert_allclose(value - res.drift - res.offset, [SEG_G[s] for s in station], atol=1e-6)
    # independent solution: numpy.linalg.lstsq on the explicit design matrix of the segment model
    # (unknowns S1..S9, levels of L1, L2#1, L2#2, drift rates of L1 and L2)
    free = sorted(s for s in SEG_G if s != "B")
    A = np.zeros((len(SEG_PLAN), len(free) + 5))
    for i, (s, lp, h) in enumerate(zip(station, loop, hours)):
        if s != "B":
            A[i, free.index(s)] = 1.0
        seg_i = 0 if lp == "L1" else (1 if h < SEG_TARE_H else 2)
        A[i, len(free) + seg_i] = 1.0
        A[i, len(free) + 3 + (lp == "L2")] = h - SEG_T0[lp]
    x, *_ = np.linalg.lstsq(A, value - np.where(station == "B", SEG_G["B"], 0.0), rcond=None)
    np.testing.assert_allclose(res.stations.loc[free, "gravity"], x[: len(free)], atol=1e-6)
    assert np.linalg.matrix_rank(A) == A.shape[1]  # the segment model is determined


def test_tare_restarting_the_drift():
    # the jolt also changed the drift rate: each segment with its own drift (tare_drift="restart")
    station, time, value, loop, _ = segment_survey(rate_after=0.05)
    res = gn.network_adjustment(
        station, time, value, loop, {"B": SEG_G["B"]}, tares=[at(SEG_TARE_H)], tare_drift="restart"
    )
    for s, g in SEG_G.items():  # analytic truth
        assert res.stations.loc[s, "gravity"] == pytest.approx(g, abs=1e-3)
    rates = res.loops.set_index("loop")["drift_rate_mgal_per_h"]
    assert rates["L2#1"] == pytest.approx(SEG_RATE["L2"], abs=1e-6)
    assert rates["L2#2"] == pytest.approx(0.05, abs=1e-6)
    assert res.tares.iloc[0]["step_mgal"] == pytest.approx(SEG_TARE, abs=1e-3)
    # one drift through the tare cannot fit a changed rate: residuals remain (the test can fail)
    res = gn.network_adjustment(station, time, value, loop, {"B": SEG_G["B"]}, tares=[at(SEG_TARE_H)])
    assert np.nanmax(np.abs(res.residuals)) > 1e-3


def test_isolated_segment_is_named():
    station, time, value, loop, hours = segment_survey()
    # after the tare the crew reads only new stations (each twice): nothing ties that segment
    after = (loop == "L2") & (hours > SEG_TARE_H)
    lonely = np.where(after, np.char.add(station.astype(str), "x"), station)
    with pytest.raises(gn.NetworkError) as info:
        gn.network_adjustment(lonely, time, value, loop, {"B": SEG_G["B"]}, tares=[at(SEG_TARE_H)])
    text = str(info.value)
    assert isinstance(info.value, FieldError) and "\n" not in text
    assert "loop L2 segment 2 of 2 (after the tare at 2024-03-06T09:18:00)" in text
    assert "readings 2024-03-06T09:30:00 to 2024-03-06T11:42:00" in text  # its time range
    assert "reoccupy a station read before it" in text  # the fix
    # with several meters, the message names the meter
    with pytest.raises(gn.NetworkError, match="meter M-0417: loop L2 segment 2"):
        gn.network_adjustment(
            lonely,
            time,
            value,
            loop,
            {"B": SEG_G["B"]},
            tares=[at(SEG_TARE_H)],
            meter=["M-0417"] * len(lonely),
        )


def test_tare_between_last_station_and_closing_base_cannot_be_told_from_drift():
    # A tare before the closing base with no station reread: drift and step are confounded
    # (two base readings, three unknowns: level, drift, step): the error names loop and tare.
    st = ["B", "S1", "S2", "B", "B", "S3", "S4", "B"]
    h = np.array([0.0, 0.5, 1.0, 1.5, 24.0, 24.5, 25.0, 25.5])
    with pytest.raises(gn.NetworkError, match=r"loop L2: its drift and the tare.*2024-03-06T09:15:00"):
        gn.network_adjustment(st, at(h), np.zeros(8), ["L1"] * 4 + ["L2"] * 4, {"B": 0.0}, tares=[at(25.25)])


def test_dial_jump_detected_and_proposed_as_tare():
    station, time, value, loop, hours = segment_survey()
    # a 25 mGal range (dial) change in loop L1 at 1.8 h, not in the field notes; base B is read
    # at 1.6 h and 2.8 h, so the jump shows between those two readings
    jumped = value + np.where((loop == "L1") & (hours > 1.8), 25.0, 0.0)
    steps = gn.detect_steps(station, time, jumped, segment=loop)
    assert len(steps) == 1
    # the step between the two base readings is the jump plus 1.2 h of drift (0.035 mGal/h)
    assert steps["step_mgal"].iloc[0] == pytest.approx(25.0 + 0.035 * 1.2, abs=1e-9)
    assert steps["station"].iloc[0] == "B"
    # drift alone (0.035 mGal/h) is never a step (common practice: drift of a few tenths of a
    # mGal per hour at most)
    assert len(gn.detect_steps(station, time, value, segment=loop)) == 0
    with pytest.raises(gn.NetworkError) as info:
        gn.network_adjustment(station, time, jumped, loop, {"B": SEG_G["B"]}, tares=[at(SEG_TARE_H)])
    text = str(info.value)
    assert "+25.042 mGal" in text and "2024-03-05T09:36:00" in text and "2024-03-05T10:48:00" in text
    assert "dial (range) change" in text
    # the proposed tare: the middle of the longest gap (1.6 h to 2.1 h) = 1.85 h = 09:51:00
    proposed = steps["proposed_tare"].iloc[0]
    assert proposed == np.datetime64("2024-03-05T09:51:00")
    assert "'2024-03-05T09:51:00Z'" in text
    # taking the proposal as a tare recovers the stations (analytic truth, 0.001 mGal)
    res = gn.network_adjustment(
        station, time, jumped, loop, {"B": SEG_G["B"]}, tares=[proposed, at(SEG_TARE_H)]
    )
    for s, g in SEG_G.items():
        assert res.stations.loc[s, "gravity"] == pytest.approx(g, abs=1e-3)
    steps = res.tares.set_index("loop")["step_mgal"]
    assert steps["L1"] == pytest.approx(25.0, abs=1e-3)
