"""A tie-line survey with known level errors over rough terrain (invented data).

Made for the levelling tests and benchmarks: a readings table as the level stage sees it
(after ingest, diurnal and reference), with the true anomaly beside it. The scenario:

* east-west traverse lines (``line_spacing`` apart) and north-south tie lines
  (``tie_spacing`` apart), flown in order, traverses first then ties, in alternating
  directions, sampled every ``step`` metres at 70 m/s;
* a drape flight over an invented terrain of ridges and valleys (relief ``relief`` m): each
  line follows the terrain smoothed along its own track with a climb/descent lag that depends
  on the flight direction, plus a per-line height bias, so traverse and tie heights at a
  crossover differ by tens of metres;
* a crustal field from harmonica's right-rectangular prisms (a shallow dyke, a plug and a
  basement step; harmonica.prism_magnetic) magnetised by induction, evaluated at each reading's
  own height, so the vertical gradient at the crossovers is the real one of the sources;
* per-line level errors: an offset (normal, ``offset_sd`` nT) plus a slow drift common to the
  survey (a smooth random function of time, ``drift_sd`` nT) and sensor noise.

``anomaly = truth + level_error + noise``; nothing here is real data.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d

__all__ = ["tie_line_survey"]

MU0 = 4e-7 * np.pi


def _terrain(rng, east, north, relief):
    """Ridges and valleys: a sum of a few random plane waves and bumps (m above a base)."""
    z = np.zeros_like(east, dtype=float)
    for _ in range(6):
        theta = rng.uniform(0, np.pi)
        wavelength = rng.uniform(1500.0, 4000.0)
        phase = rng.uniform(0, 2 * np.pi)
        z += np.cos(2 * np.pi * (east * np.cos(theta) + north * np.sin(theta)) / wavelength + phase)
    return 300.0 + relief * z / 6.0 * 2.0


def tie_line_survey(
    seed: int = 0,
    *,
    side_e: float = 8000.0,
    side_n: float = 6000.0,
    line_spacing: float = 200.0,
    tie_spacing: float = 2000.0,
    step: float = 20.0,
    relief: float = 220.0,
    clearance: float = 80.0,
    offset_sd: float = 4.0,
    drift_sd: float = 5.0,
    noise: float = 0.05,
    inclination: float = -60.0,
    declination: float = 10.0,
):
    """Readings table of an invented tie-line survey with line level errors.

    Returns
    -------
    table : pandas.DataFrame
        ``line``, ``line_type``, ``time``, ``easting``, ``northing``, ``height``, ``anomaly``
        (what the level stage levels), ``truth`` (the crustal anomaly at the reading),
        ``level_error`` and ``terrain``, sorted by line then time; ``flag_spike`` all False.
    info : dict
        Per-line offsets, the drift function's samples and the survey design.
    """
    import harmonica as hm

    rng = np.random.default_rng(seed)
    speed = 70.0
    specs = []
    n_trav = round(side_n / line_spacing) + 1
    n_tie = round(side_e / tie_spacing) + 1
    for k in range(n_trav):  # loop over lines, not readings
        x = np.arange(-200.0, side_e + 200.0 + 1e-9, step)
        specs.append(
            (f"L{1000 + 10 * k}", "traverse", x if k % 2 == 0 else x[::-1], np.full(x.size, k * line_spacing))
        )
    for k in range(n_tie):
        y = np.arange(-200.0, side_n + 200.0 + 1e-9, step)
        specs.append(
            (f"T{100 + 10 * k}", "tie", np.full(y.size, k * tie_spacing), y if k % 2 == 0 else y[::-1])
        )
    frames, clock = [], 0.0
    t0 = np.datetime64("2025-03-10T07:00:00", "ns")
    for name, kind, x, y in specs:
        wander = 8.0 * np.sin(np.arange(x.size) * step / 900.0 + rng.uniform(0, 6.3))
        e = x + (wander if kind == "tie" else 0.0)
        n = y + (0.0 if kind == "tie" else wander)
        sec = clock + np.arange(x.size) * step / speed
        clock = sec[-1] + rng.uniform(60.0, 120.0)  # turn
        frames.append(
            pd.DataFrame({"line": name, "line_type": kind, "easting": e, "northing": n, "seconds": sec})
        )
    table = pd.concat(frames, ignore_index=True)
    e, n = table["easting"].to_numpy(), table["northing"].to_numpy()
    terrain = _terrain(np.random.default_rng(seed + 1000), e, n, relief)
    # Drape: each line smooths the terrain along its track (sigma 300 m) and lags it by
    # 150 m (climbs start late), so the lag points the other way on the reverse lines;
    # a per-line height bias of sd 8 m.
    height = np.empty_like(terrain)
    codes, _ = pd.factorize(table["line"])
    bounds = np.r_[0, np.flatnonzero(np.diff(codes)) + 1, codes.size]
    bias = rng.normal(0.0, 8.0, bounds.size - 1)
    lag = round(150.0 / step)
    for i in range(bounds.size - 1):  # loop over lines
        a, b = bounds[i], bounds[i + 1]
        smooth = gaussian_filter1d(terrain[a:b], sigma=300.0 / step, mode="nearest")
        smooth = np.r_[np.full(lag, smooth[0]), smooth[:-lag]] if lag else smooth
        height[a:b] = np.maximum(smooth + clearance, terrain[a:b] + 40.0) + bias[i]
    # Crustal model: a shallow dyke (north-south), a plug and a basement step (harmonica).
    base = 300.0 - relief
    prisms = np.array(
        [
            [2400.0, 2480.0, -1000.0, 7000.0, base - 900.0, base - 10.0],
            [5200.0, 5900.0, 2600.0, 3300.0, base - 2000.0, base - 150.0],
            [-3000.0, 4000.0, -3000.0, 9000.0, base - 4000.0, base - 900.0],
        ]
    )
    chi = np.array([0.08, 0.03, 0.01])
    h = 50000.0 * 1e-9 / MU0
    u = np.array(hm.magnetic_angles_to_vec(1.0, inclination, declination))
    b = hm.prism_magnetic((e, n, height), prisms, [chi * h * u[k] for k in range(3)], field="b")
    truth = sum(bk * uk for bk, uk in zip(b, u))
    # Level errors: offset per line + a slow drift of time common to all lines.
    names = pd.unique(table["line"])
    offsets = dict(zip(names, rng.normal(0.0, offset_sd, names.size)))
    sec = table["seconds"].to_numpy()
    knots = np.arange(0.0, sec.max() + 1800.0, 900.0)
    walk = gaussian_filter1d(np.cumsum(rng.normal(0.0, 1.0, knots.size)), 1.5)
    walk = drift_sd * (walk - walk.mean()) / max(walk.std(), 1e-9)
    drift = np.interp(sec, knots, walk)
    level_error = table["line"].map(offsets).to_numpy() + drift
    table["time"] = t0 + (sec * 1e9).astype("int64").astype("timedelta64[ns]")
    table["height"] = height
    table["terrain"] = terrain
    table["truth"] = truth
    table["level_error"] = level_error
    table["anomaly"] = truth + level_error + rng.normal(0.0, noise, len(table))
    table["flag_spike"] = False
    table = table.drop(columns="seconds").sort_values(["line", "time"], ignore_index=True)
    info = {
        "offsets": {str(k): float(v) for k, v in offsets.items()},
        "drift_knots_s": knots.tolist(),
        "drift_nT": walk.tolist(),
        "line_spacing_m": line_spacing,
        "tie_spacing_m": tie_spacing,
        "inclination": inclination,
        "declination": declination,
    }
    return table, info
