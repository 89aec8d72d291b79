"""Tests of potfield.fields.lines.leveling: crossovers, tie and line adjustment, micro-levelling."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from potfield.fields.lines import leveling as lv


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------
def dipole_tmi(east, north, up, source=(2000.0, 1100.0, -800.0), moment=2e9, inc=60.0, dec=0.0):
    """Total-field anomaly of a point dipole magnetised along the main field.

    B = mu0/(4 pi) (3 (m.r^) r^ - m) / r^3 (Blakely 1995, Potential Theory in Gravity and
    Magnetic Applications, eq. 4.13), projected on the main-field direction; nT.
    """
    i, d = np.radians(inc), np.radians(dec)
    f = np.array([np.cos(i) * np.sin(d), np.cos(i) * np.cos(d), -np.sin(i)])  # east, north, up
    r = np.stack([east - source[0], north - source[1], up - source[2]])
    dist = np.sqrt((r**2).sum(axis=0))
    m = moment * f
    mdotr = np.tensordot(m, r, axes=1)
    b = 1e-7 * (3 * mdotr * r / dist**5 - m[:, None] * np.ones_like(dist) / dist**3) * 1e9
    return np.tensordot(f, b, axes=1)


def synthetic_survey(seed=0, noise=0.05, line_sd=5.0, tie_sd=3.0, diagonal_tie=False):
    """E-W traverse lines every 200 m, N-S ties every 1000 m, constant per-line offsets."""
    rng = np.random.default_rng(seed)
    rows = []
    t0 = np.datetime64("2024-05-01T08:00:00", "ns")
    clock = 0.0
    offsets = {}
    for k in range(12):  # loop over lines, not readings
        x = np.arange(0.0, 4000.0 + 1, 10.0)
        if k % 2:
            x = x[::-1]
        y = np.full(x.size, 100.0 + 200.0 * k) + 3.0 * np.sin(x / 300.0)
        offsets[f"L{k:02d}"] = rng.normal(0, line_sd)
        rows.append((f"L{k:02d}", "traverse", x, y))
    for k in range(4):
        y = np.arange(-100.0, 2500.0 + 1, 10.0)
        if k % 2:
            y = y[::-1]
        x = np.full(y.size, 300.0 + 1000.0 * k) + 2.0 * np.cos(y / 250.0)
        offsets[f"T{k}"] = rng.normal(0, tie_sd)
        rows.append((f"T{k}", "tie", x, y))
    if diagonal_tie:
        s = np.arange(0.0, 1.0 + 1e-9, 1.0 / 200)
        offsets["T9"] = rng.normal(0, tie_sd)
        rows.append(("T9", "tie", 100 + 3800 * s, 50 + 2300 * s))
    frames = []
    for name, kind, x, y in rows:
        t = t0 + ((clock + np.arange(x.size) * 0.3) * 1e9).astype("timedelta64[ns]")
        clock += x.size * 0.3 + 120.0
        frames.append(
            pd.DataFrame(
                {"line": name, "line_type": kind, "easting": x, "northing": y, "time": t, "height": 120.0}
            )
        )
    table = pd.concat(frames, ignore_index=True)
    truth = dipole_tmi(table["easting"].to_numpy(), table["northing"].to_numpy(), table["height"].to_numpy())
    table["truth"] = truth
    offset = table["line"].map(offsets).to_numpy()
    table["offset"] = offset
    table["anomaly"] = truth + offset + rng.normal(0, noise, len(table))
    return table, offsets


def crossovers_of(table, **kwargs):
    return lv.find_crossovers(
        table["easting"],
        table["northing"],
        table["line"],
        table["line_type"] == "tie",
        table["anomaly"],
        table["time"],
        table["height"],
        **kwargs,
    )


def brute_force_points(x, y, names, is_tie):
    """All traverse/tie segment intersections by testing every pair (broadcasting, O(n^2))."""
    seg = []
    for name in pd.unique(names):  # loop over lines
        sel = np.flatnonzero(names == name)
        seg.append(
            np.column_stack(
                [x[sel][:-1], y[sel][:-1], x[sel][1:], y[sel][1:], np.full(sel.size - 1, is_tie[sel][0])]
            )
        )
    seg = np.vstack(seg)
    a, b = seg[seg[:, 4] == 0], seg[seg[:, 4] == 1]
    p = a[:, None, :2]
    r = a[:, None, 2:4] - p
    q = b[None, :, :2]
    s = b[None, :, 2:4] - q
    cross = r[..., 0] * s[..., 1] - r[..., 1] * s[..., 0]
    qp = q - p
    t = (qp[..., 0] * s[..., 1] - qp[..., 1] * s[..., 0]) / cross
    u = (qp[..., 0] * r[..., 1] - qp[..., 1] * r[..., 0]) / cross
    hit = (t >= 0) & (t <= 1) & (u >= 0) & (u <= 1)
    pts = (p + t[..., None] * r)[hit]
    return pts[np.lexsort((pts[:, 1], pts[:, 0]))]


# --------------------------------------------------------------------------------------------
# (d) segment intersection
# --------------------------------------------------------------------------------------------
def test_crossover_hand_geometry():
    # Traverse line through (0,0) (4,2) (8,0); tie x = 3 from y=-1 to y=5.
    # By hand: y = x/2 on the first segment -> crossing (3, 1.5) at t = 3/4 (of segment 0) and
    # u = 2.5/6 along the tie segment.
    x = np.array([0.0, 4.0, 8.0, 3.0, 3.0])
    y = np.array([0.0, 2.0, 0.0, -1.0, 5.0])
    names = np.array(["L1", "L1", "L1", "T1", "T1"])
    tie = np.array([False, False, False, True, True])
    values = np.array([10.0, 14.0, 0.0, 1.0, 7.0])
    time = np.array([0.0, 4.0, 8.0, 100.0, 106.0])
    height = np.array([100.0, 104.0, 100.0, 90.0, 96.0])
    c = lv.find_crossovers(x, y, names, tie, values, time, height, max_segment_length=100)
    assert len(c) == 1
    row = c.iloc[0]
    assert row["easting"] == pytest.approx(3.0) and row["northing"] == pytest.approx(1.5)
    assert row["fraction_line"] == pytest.approx(0.75)
    assert row["fraction_tie"] == pytest.approx(2.5 / 6)
    assert row["value_line"] == pytest.approx(13.0)  # 10 + 0.75 * 4, by hand
    assert row["value_tie"] == pytest.approx(3.5)  # 1 + 2.5 (1 per unit of y), by hand
    assert row["difference"] == pytest.approx(9.5)
    assert row["time_line"] == pytest.approx(3.0) and row["time_tie"] == pytest.approx(102.5)
    assert row["height_difference"] == pytest.approx(103.0 - 92.5)
    assert row["index_line"] == 0 and row["index_tie"] == 3
    assert not row["flagged"]


def test_crossover_multiple_crossings_gap_and_flags():
    # A U-shaped traverse line crosses the straight tie y = 5 twice (hand geometry: x = 2, x = 8).
    x = np.array([2.0, 2.0, 8.0, 8.0, 0.0, 10.0])
    y = np.array([0.0, 10.0, 10.0, 0.0, 5.0, 5.0])
    x[:4] = [2.0, 2.0, 8.0, 8.0]
    y[:4] = [0.0, 10.0, 10.0, 0.0]
    names = np.array(["L1"] * 4 + ["T1"] * 2)
    tie = np.array([False] * 4 + [True] * 2)
    values = np.zeros(6)
    c = lv.find_crossovers(x, y, names, tie, values, max_segment_length=20)
    assert sorted(c["easting"].round(9)) == [2.0, 8.0]
    assert np.allclose(c["northing"], 5.0)
    # The same tracks with a 6 m limit: the tie's only segment (10 m) is a gap, nothing found.
    assert len(lv.find_crossovers(x, y, names, tie, values, max_segment_length=6.0)) == 0
    # A flagged reading at the end of the first crossing segment flags that crossover only.
    flagged = np.zeros(6, bool)
    flagged[0] = True
    c = lv.find_crossovers(x, y, names, tie, values, flagged=flagged, max_segment_length=20)
    by_x = c.set_index(c["easting"].round(6))["flagged"]
    assert bool(by_x[2.0]) and not bool(by_x[8.0])


def test_crossover_at_shared_reading_counted_once():
    # The tie passes exactly through reading 1 of the line (common vertex): one crossover.
    x = np.array([0.0, 5.0, 10.0, 5.0, 5.0])
    y = np.array([0.0, 0.0, 0.0, -5.0, 5.0])
    names = np.array(["L"] * 3 + ["T"] * 2)
    tie = np.array([False] * 3 + [True] * 2)
    c = lv.find_crossovers(x, y, names, tie, np.arange(5.0), max_segment_length=20)
    assert len(c) == 1 and c["easting"].iloc[0] == pytest.approx(5.0)


def test_crossovers_match_brute_force_search():
    # Independent check of the bucketing: every pair of segments tested by broadcasting.
    table, _ = synthetic_survey(seed=3, diagonal_tie=False)
    sub = table[(table["easting"] < 1500) & (table["northing"] < 1000)].reset_index(drop=True)
    x, y = sub["easting"].to_numpy(), sub["northing"].to_numpy()
    names, tie = sub["line"].to_numpy(), (sub["line_type"] == "tie").to_numpy()
    expected = brute_force_points(x, y, names, tie)
    c = lv.find_crossovers(x, y, names, tie, np.zeros(len(sub)), tie_tie=False)
    got = c[["easting", "northing"]].to_numpy()
    got = got[np.lexsort((got[:, 1], got[:, 0]))]
    assert len(expected) == 10  # 5 lines x 2 ties in the window (by construction)
    assert got.shape == expected.shape
    assert np.allclose(got, expected, atol=1e-6)


def test_crossovers_match_shapely_if_installed():
    shapely = pytest.importorskip("shapely")  # not a dependency; checked only where present
    from shapely.geometry import LineString

    table, _ = synthetic_survey(seed=4, diagonal_tie=True)
    c = crossovers_of(table, tie_tie=True)
    tracks = {n: LineString(g[["easting", "northing"]].to_numpy()) for n, g in table.groupby("line")}
    for row in c.itertuples():
        hit = tracks[row.line].intersection(tracks[row.tie])
        pts = np.array([[p.x, p.y] for p in getattr(hit, "geoms", [hit])])
        assert np.min(np.hypot(pts[:, 0] - row.easting, pts[:, 1] - row.northing)) < 1e-6
    assert shapely.__version__


# --------------------------------------------------------------------------------------------
# (a) adjustment against an explicit least-squares solution
# --------------------------------------------------------------------------------------------
def _crossover_rows(rows):
    frame = pd.DataFrame(rows, columns=["kind", "line", "tie", "difference", "time_line"])
    frame["flagged"] = False
    frame["height_difference"] = 0.0
    return frame


def test_tie_network_matches_explicit_lstsq():
    # Ties A, B (E-W) cross C, D (N-S); E crosses A and C. Misclosures d = tie_i - tie_j.
    rng = np.random.default_rng(1)
    ties = ["A", "B", "C", "D", "E"]
    true = {"A": 2.0, "B": -1.0, "C": 0.5, "D": 3.0, "E": -4.5}
    pairs = [("A", "C"), ("A", "D"), ("B", "C"), ("B", "D"), ("A", "E"), ("C", "E"), ("A", "C")]
    rows = [("tie-tie", i, j, true[i] - true[j] + rng.normal(0, 0.2), 0.0) for i, j in pairs]
    rows += [("traverse-tie", "L1", "A", 1.0, 0.0), ("traverse-tie", "L1", "B", 4.0, 10.0)]
    cx = _crossover_rows(rows)
    result = lv.adjust_ties(cx, ties, huber_threshold=None)
    # Independent solution: design matrix with +1/-1 per crossover and the datum row
    # sum(a) = 0 (minimise sum (d + a_i - a_j)^2; Yarger et al. 1978, Geophysics 43:1148).
    design = np.zeros((len(pairs) + 1, len(ties)))
    target = np.zeros(len(pairs) + 1)
    for r, (i, j) in enumerate(pairs):
        design[r, ties.index(i)] = 1.0
        design[r, ties.index(j)] = -1.0
        target[r] = -cx["difference"].iloc[r]
    design[-1] = 1.0
    expected = np.linalg.lstsq(design, target, rcond=None)[0]
    assert np.allclose(result.corrections[ties].to_numpy(), expected, atol=1e-10)
    assert result.corrections.mean() == pytest.approx(0.0, abs=1e-12)  # documented datum
    # The adjusted ties recover the true relative levels within the noise.
    rel = result.corrections.to_numpy() + np.array([true[t] for t in ties])
    assert np.ptp(rel) < 0.5
    assert set(result.method) == {"network"}


def test_parallel_ties_use_mean_traverse_misclosure():
    # Ties that do not cross: each tie's constant is the mean misclosure (line - tie) at it,
    # then the mean over ties is removed (datum; Luyendyk 1997).
    rows = [
        ("traverse-tie", "L1", "A", 3.0, 0.0),
        ("traverse-tie", "L2", "A", 5.0, 0.0),
        ("traverse-tie", "L1", "B", -1.0, 0.0),
        ("traverse-tie", "L2", "B", 1.0, 0.0),
    ]
    result = lv.adjust_ties(_crossover_rows(rows), ["A", "B", "C"], huber_threshold=None)
    # by hand: means 4 and 0 -> minus their mean 2 -> +2, -2; C has no crossover -> 0
    assert result.corrections["A"] == pytest.approx(2.0)
    assert result.corrections["B"] == pytest.approx(-2.0)
    assert result.corrections["C"] == 0.0
    assert list(result.method) == ["misclosure", "misclosure", "none"]


def test_linear_line_correction_matches_explicit_lstsq():
    rng = np.random.default_rng(2)
    t = np.array([0.0, 40.0, 95.0, 150.0, 230.0, 300.0])
    tie_corr = pd.Series({"A": 0.7, "B": -0.7})
    tie = ["A", "B"] * 3
    d = 3.0 + 0.02 * t + rng.normal(0, 0.1, t.size)
    cx = _crossover_rows([("traverse-tie", "L1", tie[k], d[k], t[k]) for k in range(t.size)])
    adj = lv.adjust_lines(cx, tie_corr, model="linear", huber_threshold=None)
    # Independent: f(t) = c0 + c1 t minimising sum (d - a_tie + f(t))^2 (Yarger et al. 1978).
    target = -(d - tie_corr[tie].to_numpy())
    design = np.column_stack([np.ones_like(t), t])
    coef = np.linalg.lstsq(design, target, rcond=None)[0]
    got = adj.evaluate(["L1"] * t.size, t)
    assert np.allclose(got, design @ coef, atol=1e-10)
    # Held constant beyond the first and last crossover (common practice), not extrapolated.
    assert adj.evaluate(["L1"], np.array([1000.0]))[0] == pytest.approx(coef[0] + coef[1] * 300.0)
    assert adj.evaluate(["other"], np.array([10.0]))[0] == 0.0


def test_huber_irls_is_a_weighted_least_squares_fixed_point():
    rng = np.random.default_rng(5)
    a = np.column_stack([np.ones(40), np.linspace(-1, 1, 40)])
    b = a @ np.array([1.0, 2.0]) + rng.normal(0, 0.1, 40)
    b[[3, 17]] += [5.0, -8.0]
    x, w = lv.robust_lstsq(a, b, threshold=1.5, tol=1e-13, max_iter=200)
    sw = np.sqrt(w)
    x_ref = np.linalg.lstsq(a * sw[:, None], b * sw, rcond=None)[0]
    assert np.allclose(x, x_ref, atol=1e-8)
    # Huber (1964): w = min(1, k s / |r|) with s = 1.4826 MAD.
    r = b - a @ x
    s = 1.4826 * np.median(np.abs(r - np.median(r)))
    assert np.allclose(w, np.minimum(1.0, 1.5 * s / np.abs(r)), atol=1e-6)
    assert w[3] < 0.1 and w[17] < 0.1


def test_too_few_crossovers_keep_level_and_degree_is_lowered():
    rows = [
        ("traverse-tie", "L1", "A", 2.0, 0.0),
        ("traverse-tie", "L2", "A", 1.0, 0.0),
        ("traverse-tie", "L2", "B", 3.0, 50.0),
    ]
    adj = lv.adjust_lines(
        _crossover_rows(rows),
        model="quadratic",
        lines=["L1", "L2", "L3"],
        min_crossovers=2,
        huber_threshold=None,
    )
    assert adj.unlevelled == ["L1", "L3"]
    assert adj.degree["L2"] == 1  # two crossovers fix at most a line
    assert adj.evaluate(["L1", "L2", "L2"], np.array([0.0, 0.0, 50.0])) == pytest.approx([0.0, -1.0, -3.0])


# --------------------------------------------------------------------------------------------
# (b) synthetic survey with known offsets over a dipole field
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("diagonal", [False, True])
def test_offsets_recovered_on_synthetic_survey(diagonal):
    table, offsets = synthetic_survey(seed=7, diagonal_tie=diagonal)
    cx = crossovers_of(table)
    n_trav = (cx["kind"] == "traverse-tie").sum()
    # 12 traverse lines x 4 straight-ish ties, plus the diagonal tie crossing all 12 lines
    assert n_trav == 48 + (12 if diagonal else 0)
    if diagonal:
        assert (cx["kind"] == "tie-tie").sum() == 4  # the diagonal crosses each N-S tie once
    ties = lv.adjust_ties(cx, huber_threshold=1.5)
    adj = lv.adjust_lines(cx, ties.corrections, model="constant", huber_threshold=1.5)
    corr = adj.evaluate(table["line"], table["time"])
    is_tie = table["line_type"].to_numpy() == "tie"
    corr[is_tie] = table["line"][is_tie].map(ties.corrections).to_numpy()
    error = table["anomaly"].to_numpy() + corr - table["truth"].to_numpy()
    tie_mean = np.mean([v for k, v in offsets.items() if k.startswith("T")])
    # Datum: the levelled survey sits at the mean tie level (mean tie correction zero).
    per_line = pd.Series(error).groupby(table["line"].to_numpy()).mean()
    # Within the noise: 3 sigma of one crossover misclosure, 3 * sqrt(2) * 0.05 nT (the tie
    # network of the diagonal case is a tree, so a tie level rests on single crossovers), while
    # the injected offsets have a standard deviation of 5 nT.
    assert np.allclose(per_line, tie_mean, atol=3 * np.sqrt(2) * 0.05)
    before = np.sqrt(np.mean(cx["difference"] ** 2))
    corr_line = np.where(
        cx["kind"] == "traverse-tie",
        adj.evaluate(cx["line"], cx["time_line"]),
        cx["line"].map(ties.corrections).to_numpy(),
    )
    d_after = cx["difference"] + corr_line - cx["tie"].map(ties.corrections)
    after = np.sqrt(np.mean(d_after**2))
    assert before / after >= 5.0  # brief: crossover RMS drops at least 5x
    assert after < 0.15


def test_linear_drift_recovered():
    table, _ = synthetic_survey(seed=8, line_sd=0.0, tie_sd=0.0)
    trav = table["line_type"] == "traverse"
    sec = (table["time"] - table["time"].min()).dt.total_seconds().to_numpy()
    # A drift of 0.02 nT/s on traverse lines (linear in time; Yarger et al. 1978 model).
    t_line0 = table.groupby("line")["time"].transform("min")
    local = (table["time"] - t_line0).dt.total_seconds().to_numpy()
    table.loc[trav, "anomaly"] += 0.02 * local[trav] - 1.0
    cx = crossovers_of(table)
    ties = lv.adjust_ties(cx)
    adj = lv.adjust_lines(cx, ties.corrections, model="linear")
    corr = adj.evaluate(table["line"], table["time"])
    corr[~trav.to_numpy()] = 0.0
    error = (table["anomaly"] + corr - table["truth"]).to_numpy()
    # inside the span of the crossovers (x between the outer ties) the drift is removed
    inside = trav.to_numpy() & (table["easting"].between(300, 3300)).to_numpy()
    assert np.max(np.abs(error[inside] - np.median(error[inside]))) < 0.3
    assert sec.max() > 0


# --------------------------------------------------------------------------------------------
# (c) robustness: one wild crossover
# --------------------------------------------------------------------------------------------
def test_one_wild_crossover_does_not_move_a_line():
    rng = np.random.default_rng(11)
    d = 5.0 + rng.normal(0, 0.1, 10)
    d[4] += 50.0  # one wild crossover
    cx = _crossover_rows([("traverse-tie", "L1", f"T{k}", d[k], float(k)) for k in range(10)])
    robust = lv.adjust_lines(cx, model="constant", huber_threshold=1.5)
    plain = lv.adjust_lines(cx, model="constant", huber_threshold=None)
    clean_level = -np.mean(np.delete(d, 4))
    # Huber (1964): bounded influence, the outlier moves the level by at most ~k*sigma/n.
    assert abs(robust.evaluate(["L1"], np.array([0.0]))[0] - clean_level) < 0.05
    # ordinary least squares is moved by 50/10 = 5 nT: the test can fail
    assert abs(plain.evaluate(["L1"], np.array([0.0]))[0] - clean_level) > 4.0
    assert robust.weights[4] < 0.05


def test_height_and_flag_filters_drop_crossovers():
    cx = _crossover_rows(
        [
            ("traverse-tie", "L1", "A", 1.0, 0.0),
            ("traverse-tie", "L1", "B", 1.0, 1.0),
            ("traverse-tie", "L1", "C", 9.0, 2.0),
            ("traverse-tie", "L1", "D", 9.0, 3.0),
        ]
    )
    cx.loc[2, "height_difference"] = 45.0  # above the 30 m limit (common practice)
    cx.loc[3, "flagged"] = True
    adj = lv.adjust_lines(cx, model="constant", max_height_difference=30.0, huber_threshold=None)
    assert adj.counts["L1"] == 2
    assert adj.evaluate(["L1"], np.array([0.0]))[0] == pytest.approx(-1.0)


# --------------------------------------------------------------------------------------------
# (e) micro-levelling
# --------------------------------------------------------------------------------------------
def striped_grid(seed=0, spacing=100.0, cell=25.0):
    rng = np.random.default_rng(seed)
    east = np.arange(0.0, 6000.0 + 1, cell)
    north = np.arange(0.0, 6000.0 + 1, cell)
    ee, nn = np.meshgrid(east, north)
    anomaly = dipole_tmi(
        ee.ravel(), nn.ravel(), np.full(ee.size, 100.0), source=(3000.0, 3000.0, -500.0), moment=5e8
    ).reshape(ee.shape)
    line_index = np.floor(north / spacing + 0.5).astype(int)  # nearest line (ties upward)
    amp = rng.uniform(0.5, 1.5, line_index.max() + 1) * (-1.0) ** np.arange(line_index.max() + 1)
    stripes = np.repeat(amp[line_index][:, None], east.size, axis=1)
    return east, north, anomaly, stripes


def test_micro_level_removes_corrugation_and_keeps_anomaly():
    east, north, anomaly, stripes = striped_grid()
    grid = xr.DataArray(
        anomaly + stripes, coords={"northing": north, "easting": east}, dims=("northing", "easting")
    )
    corr = lv.micro_level(grid, 90.0, 100.0, cutoff_spacings=3.0, max_amplitude=2.0).to_numpy()
    cleaned = grid.to_numpy() - corr
    core = (slice(20, -20), slice(20, -20))
    before = np.sqrt(np.mean(stripes[core] ** 2))
    after = np.sqrt(np.mean((cleaned - anomaly)[core] ** 2))
    # Line-parallel stripes alternating in sign (across wavelength 2 line spacings, inside the
    # high-pass band) are mostly removed (Minty 1991); the random part of their amplitudes at
    # longer across-line wavelengths stays, by design of the 3-spacing cut-off.
    assert after < before / 2.5
    # Peak-to-peak of the anomaly changes by < 2 % (brief; a filter that invents features fails)
    p2p = np.ptp(anomaly)
    assert p2p > 100.0
    assert abs(np.ptp(cleaned) - p2p) / p2p < 0.02
    only = xr.DataArray(anomaly, coords=grid.coords, dims=grid.dims)
    leak = lv.micro_level(only, 90.0, 100.0, cutoff_spacings=3.0, max_amplitude=2.0).to_numpy()
    assert abs(np.ptp(anomaly - leak) - p2p) / p2p < 0.02
    assert np.max(np.abs(corr)) <= 2.0 + 1e-12  # clipped


def test_micro_level_direction_and_mask():
    # Stripes along north-south lines (azimuth 0) are removed with direction 0 but not with 90.
    east, north, _, stripes = striped_grid(seed=1)
    values = stripes.T.copy()
    values[:5, :5] = np.nan
    grid = xr.DataArray(values, coords={"northing": north, "easting": east}, dims=("northing", "easting"))
    core = (slice(20, -20), slice(20, -20))
    good = lv.micro_level(grid, 0.0, 100.0, max_amplitude=5.0).to_numpy()
    wrong = lv.micro_level(grid, 90.0, 100.0, max_amplitude=5.0).to_numpy()
    rms = np.sqrt(np.mean(values[core] ** 2))
    assert np.sqrt(np.mean((values - good)[core] ** 2)) < rms / 3
    assert np.sqrt(np.mean((values - wrong)[core] ** 2)) > 0.9 * rms
    assert np.isnan(good[:5, :5]).all() and np.isfinite(good[5:, 5:]).all()


def test_line_azimuth_axial_mean():
    # Lines flown alternately east and west: direction 90 deg (axial mean, Mardia and Jupp 2000).
    x = np.r_[0.0, 1000.0, 1000.0, 0.0]
    y = np.r_[0.0, 10.0, 200.0, 190.0]
    # both lines are 10 m off east-west over 1000 m: azimuth atan2(1000, 10) = 89.43 deg
    assert lv.line_azimuth(x, y, ["a", "a", "b", "b"]) == pytest.approx(
        np.degrees(np.arctan2(1000.0, 10.0)), abs=1e-9
    )
    assert lv.line_azimuth([0, 0], [0, 5], ["a", "a"]) == pytest.approx(0.0)


def test_lowpass_along_lines_keeps_constants_and_smooths_noise():
    rng = np.random.default_rng(0)
    d = np.tile(np.arange(0.0, 2000.0, 10.0), 2)
    lines = np.repeat(["a", "b"], d.size // 2)
    values = np.where(lines == "a", 1.0, -2.0) + rng.normal(0, 0.5, d.size)
    out = lv.lowpass_along_lines(values, lines, d, 500.0)
    assert np.allclose(out[lines == "a"], 1.0, atol=0.3)
    assert np.allclose(out[lines == "b"], -2.0, atol=0.3)
    assert np.std(out[lines == "a"]) < 0.2 * np.std(values[lines == "a"])


# --------------------------------------------------------------------------------------------
# full network solve
# --------------------------------------------------------------------------------------------
def test_network_solve_matches_explicit_lstsq():
    rng = np.random.default_rng(21)
    ties = ["A", "B", "C"]
    lines = ["L1", "L2", "L3", "L4"]
    rows = [("tie-tie", "A", "C", 0.4, 0.0), ("tie-tie", "B", "C", -0.3, 5.0)]
    for n in lines:
        for tname in ties:
            rows.append(("traverse-tie", n, tname, rng.normal(0, 2.0), rng.uniform(0, 100)))
    cx = _crossover_rows(rows)
    tie_adj, line_adj = lv.adjust_network(cx, model="linear", huber_threshold=None)
    # Independent: unknowns [a_A, a_B, a_C, c0_L, c1_L ...]; rows d + f_i(t) - f_j(t) = 0 and
    # the datum row a_A + a_B + a_C = 0 (Yarger et al. 1978). Time in raw seconds: the fitted
    # polynomial values do not depend on how time is scaled.
    design = np.zeros((len(rows) + 1, 3 + 2 * len(lines)))
    target = np.zeros(len(rows) + 1)
    for r, (kind, i, j, d, t) in enumerate(rows):
        if kind == "tie-tie":
            design[r, ties.index(i)] = 1.0
        else:
            k = 3 + 2 * lines.index(i)
            design[r, k], design[r, k + 1] = 1.0, t
        design[r, ties.index(j)] -= 1.0
        target[r] = -d
    design[-1, :3] = 1.0
    x = np.linalg.lstsq(design, target, rcond=None)[0]
    assert np.allclose(tie_adj.corrections[ties].to_numpy(), x[:3], atol=1e-6)
    t = cx["time_line"].to_numpy()
    mask = cx["kind"].to_numpy() == "traverse-tie"
    got = line_adj.evaluate(cx["line"][mask], t[mask])
    ref = np.array(
        [
            x[3 + 2 * lines.index(n)] + x[4 + 2 * lines.index(n)] * tt
            for n, tt in zip(cx["line"][mask], t[mask])
        ]
    )
    assert np.allclose(got, ref, atol=1e-6)


def test_network_solve_recovers_offsets():
    table, offsets = synthetic_survey(seed=9, diagonal_tie=True)
    cx = crossovers_of(table)
    tie_adj, line_adj = lv.adjust_network(cx, model="constant")
    corr = line_adj.evaluate(table["line"], table["time"])
    is_tie = table["line_type"].to_numpy() == "tie"
    corr[is_tie] = table["line"][is_tie].map(tie_adj.corrections).to_numpy()
    err = pd.Series(table["anomaly"].to_numpy() + corr - table["truth"].to_numpy())
    per_line = err.groupby(table["line"].to_numpy()).mean()
    tie_mean = np.mean([v for k, v in offsets.items() if k.startswith("T")])
    # datum: mean tie correction zero; within 3 sigma of one misclosure (3 sqrt(2) 0.05 nT)
    assert np.allclose(per_line, tie_mean, atol=3 * np.sqrt(2) * 0.05)
    assert tie_adj.corrections.mean() == pytest.approx(0.0, abs=1e-9)


def test_micro_level_oblique_lines_and_descending_grid():
    # Lines flown at azimuth 45 deg (towards north-east): the stripe level depends on the
    # across-line coordinate (x - y)/sqrt(2) only (geometry by hand). A wrong sign of either
    # wavenumber component would orient the filter at 135 deg and leave the stripes.
    east = np.arange(0.0, 4000.0 + 1, 25.0)
    north = np.arange(0.0, 4000.0 + 1, 25.0)
    ee, nn = np.meshgrid(east, north)
    across = (ee - nn) / np.sqrt(2.0)
    stripes = np.where(np.floor(across / 100.0) % 2 == 0, 1.0, -1.0)
    grid = xr.DataArray(stripes, coords={"northing": north, "easting": east}, dims=("northing", "easting"))
    core = (slice(30, -30), slice(30, -30))
    good = lv.micro_level(grid, 45.0, 100.0, max_amplitude=5.0).to_numpy()
    wrong = lv.micro_level(grid, 135.0, 100.0, max_amplitude=5.0).to_numpy()
    assert np.sqrt(np.mean((stripes - good)[core] ** 2)) < 0.4
    assert np.sqrt(np.mean((stripes - wrong)[core] ** 2)) > 0.9
    # The same grid stored with northing descending gives the same corrugation.
    flipped = grid.isel(northing=slice(None, None, -1))
    again = lv.micro_level(flipped, 45.0, 100.0, max_amplitude=5.0)
    assert np.allclose(again.sel(northing=north).to_numpy(), good)


# --------------------------------------------------------------------------------------------
# adaptive levelling: height gate, vertical gradient, neighbour corrections
# --------------------------------------------------------------------------------------------
def test_height_gate_is_median_plus_mad_multiple():
    dh = np.array([-2.0, 4.0, 6.0, 8.0, 10.0, 12.0, 14.0, 200.0, np.nan])
    # |dh| = 2, 4, ..., 14, 200: median 9, |dev| = 7,5,3,1,1,3,5,191 -> MAD 4
    # (Huber 1981, Robust Statistics, sec. 5.1: median + k * 1.4826 MAD)
    assert lv.height_gate(dh, 3.0, floor=0.0) == pytest.approx(9.0 + 3 * 1.4826 * 4.0)
    assert lv.height_gate(dh, 3.0, floor=50.0) == 50.0  # never below the floor
    assert lv.height_gate([np.nan]) == np.inf


def test_vertical_gradient_matches_a_finite_difference_of_the_dipole():
    # readings on lines 100 m apart, 10 m along, at 120 m; gradient at scattered points
    # against the centred difference of the analytic dipole field (Blakely 1995 eq. 4.13)
    e, n = np.meshgrid(np.arange(0.0, 4001.0, 10.0), np.arange(0.0, 3001.0, 100.0))
    e, n = e.ravel(), n.ravel()
    values = dipole_tmi(e, n, np.full(e.size, 120.0), source=(2000.0, 1500.0, -400.0))
    rng = np.random.default_rng(0)
    pe, pn = rng.uniform(800, 3200, 200), rng.uniform(600, 2400, 200)
    got = lv.vertical_gradient_at(e, n, values, pe, pn, cell=50.0, smoothing=0.0)
    true = (
        dipole_tmi(pe, pn, np.full(pe.size, 121.0), source=(2000.0, 1500.0, -400.0))
        - dipole_tmi(pe, pn, np.full(pe.size, 119.0), source=(2000.0, 1500.0, -400.0))
    ) / 2.0
    assert np.corrcoef(got, true)[0, 1] > 0.98
    assert np.sqrt(np.mean((got - true) ** 2)) < 0.15 * np.sqrt(np.mean(true**2))


def test_height_corrected_differences_remove_the_taylor_step():
    cx = pd.DataFrame({"difference": [3.0, -1.0, 2.0], "height_difference": [10.0, -20.0, np.nan]})
    out = lv.height_corrected_differences(cx, np.array([0.2, 0.05, 0.3]))
    # d - g dh (first-order Taylor step): 3 - 2, -1 + 1, unknown height -> unchanged
    np.testing.assert_allclose(out, [1.0, 0.0, 2.0])


def test_neighbour_corrections_interpolate_in_time():
    t0 = np.datetime64("2024-05-01T08:00:00", "ns")
    lines = np.repeat(["A", "B", "C", "D"], 3)
    sec = np.array([0, 10, 20, 100, 110, 120, 200, 210, 220, 300, 310, 320], float)
    time = t0 + (sec * 1e9).astype("int64").astype("timedelta64[ns]")
    corr = np.repeat([1.0, 0.0, 5.0, 0.0], 3)
    source = np.isin(lines, ["A", "C"])
    target = np.isin(lines, ["B", "D"])
    out = lv.neighbour_corrections(lines, time, corr, source, target)
    assert np.all(np.isnan(out[source]))
    # B between A (mean time 10 s, 1) and C (210 s, 5): linear in time (common practice)
    np.testing.assert_allclose(out[3:6], 1.0 + 4.0 * (sec[3:6] - 10.0) / 200.0)
    np.testing.assert_allclose(out[9:], 5.0)  # after the last source line: held constant
    no_time = lv.neighbour_corrections(lines, None, corr, source, target)
    np.testing.assert_allclose(no_time[target], 3.0)  # mean of the sources without times
