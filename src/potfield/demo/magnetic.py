"""Airborne magnetic demo survey with known truth.

All data are invented (fictional area, see :mod:`potfield.demo.common`). The scenario:

* east-west traverse lines (nominal spacing 200 m) and north-south tie lines (2000 m), flown at
  10 Hz and about 70 m/s ground speed (a wind makes the speed differ with flight direction), in
  alternating directions, with a smooth random wander off the planned lines;
* a drape flight 80 m above a synthetic terrain (the aircraft follows a smoothed terrain, plus
  a smooth drape error and two climbs over obstacles);
* a crustal field forward-modelled with harmonica's right-rectangular prisms (Nagy et al. 2000,
  J. Geodesy 74:552; magnetic kernels of Bhattacharyya 1964, Geophysics 29:517, as implemented
  in harmonica; Fatiando a Terra Project 2024, harmonica 0.7): a dipping dyke (a stack of
  prisms shifted down dip), an intrusive plug with remanent magnetisation and a faulted
  basement (a coarse layer of prisms), magnetised by induction in the IGRF direction
  (potfield.fields.magnetic.igrf) and observed as the total-field anomaly ``b . F_hat`` (Blakely 1995,
  Potential Theory in Gravity and Magnetic Applications, CUP, eq. 12.1);
* the main field: IGRF-14 at every reading's position and time (IAGA Working Group V-MOD 2024);
* an external field: a solar-quiet-like daily variation in local time (Chapman and Bartels
  1940, Geomagnetism, Oxford) plus pulsation-like wave packets and a bay, the same regional
  vector at the aircraft, the base station and a distant observatory (only local time makes
  them differ), projected on the main-field direction for the scalar readings;
* per-line level errors, sensor noise (0.05 nT), a few spikes and short gaps in the recording.

The readings' total field is the scalar sum ``igrf_total + crustal + external + level_error +
noise + spike`` (the first-order total-field anomaly approximation; Blakely 1995, sec. 12.1),
exactly the decomposition the processing inverts, and truth/readings_truth.csv holds every term.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d

from ..io.atomic import write_text
from ..io.grids import make_grid, write_netcdf
from . import common
from .common import rng_for

#: Readings of the committed demo.
DEFAULT_READINGS = 30_000
#: Smallest and largest supported size.
MIN_READINGS = 1_000
#: Below this size the area is smaller than two standard tie spacings: three ties at half the
#: side instead (sizes from here up keep the standard plan, so their files are unchanged).
SMALL_PLAN_BELOW = 10_000
MAX_READINGS = 10_000_000
#: Survey design (m, m/s, Hz, m).
LINE_SPACING = 200.0
TIE_SPACING = 2000.0
SPEED = 70.0
RATE_HZ = 10.0
CLEARANCE = 80.0
#: First flight (UTC): 22:30 UTC is about 08:10 local solar time at 145.6 deg E.
FIRST_FLIGHT = np.datetime64("2024-11-18T22:30:00", "ns")
MAX_FLIGHT_S = 4.5 * 3600.0
#: Readings per chunk of the field synthesis (bounds the memory at 10 million readings).
CHUNK = 1_000_000
SURVEY_FILE = "mag_lines.csv"
BASE_FILE = "base_station.csv"
OBSERVATORY_CODE = "QVX"
OBSERVATORY = {"lon": 148.95, "lat": -35.35, "elevation": 610.0, "name": "Quellvane Ridge (fictional)"}


# --- external field ----------------------------------------------------------------------------


def external_events(rng: np.random.Generator, windows: list[tuple[float, float]]) -> dict:
    """Random parameters of the external variation: a daily solar-quiet-like pattern with a
    day-to-day amplitude factor, pulsation-like wave packets and bays inside the flight windows.

    Parameters
    ----------
    rng : numpy.random.Generator
    windows : list of (start, end)
        Flight windows in seconds since :data:`FIRST_FLIGHT`.
    """
    days = int(np.ceil((windows[-1][1] + 2 * 86400) / 86400.0)) + 1
    events = {
        "sq_day_factor": rng.uniform(0.75, 1.25, days).tolist(),
        "sq_amplitude_nT": {"north": 14.0, "east": -12.0, "down": 24.0},
        "pulsations": [],
        "bays": [],
    }
    for start, end in windows:
        span = end - start
        for _ in range(3):
            d = rng.standard_normal(3)
            events["pulsations"].append(
                {
                    "t0_s": float(start + rng.uniform(0.05, 0.95) * span),
                    "period_s": float(rng.uniform(30.0, 200.0)),
                    "width_s": float(rng.uniform(240.0, 900.0)),
                    "amplitude_nT": float(rng.uniform(1.0, 4.0)),
                    "phase": float(rng.uniform(0, 2 * np.pi)),
                    "direction": (d / np.linalg.norm(d)).tolist(),
                }
            )
        events["bays"].append(
            {
                "t0_s": float(start + rng.uniform(0.2, 0.8) * span),
                "width_s": float(rng.uniform(1200.0, 2400.0)),
                "amplitude_nT": float(rng.uniform(8.0, 18.0)),
            }
        )
    return events


def external_vector(seconds: np.ndarray, longitude, events: dict):
    """External (ionospheric/magnetospheric) variation vector (north, east, down) in nT.

    A solar-quiet-like daily variation: smooth daytime bells in local solar time (UT +
    longitude/15 h) whose shape follows the classic mid-latitude Sq picture of a daytime
    vortex (Chapman and Bartels 1940, Geomagnetism, Oxford, ch. 7), scaled per day; plus
    Gaussian-windowed sinusoidal wave packets (pulsation-like) and Gaussian bays (mostly in the
    north component).

    Parameters
    ----------
    seconds : array
        Seconds since :data:`FIRST_FLIGHT` (UTC).
    longitude : float or array
        Degrees east (local time).
    events : dict
        From :func:`external_events`.

    Returns
    -------
    north, east, down : numpy.ndarray
    """
    t = np.asarray(seconds, dtype=float)
    ut_hours = (FIRST_FLIGHT - FIRST_FLIGHT.astype("datetime64[D]")).astype(float) / 3.6e12
    local = ut_hours + t / 3600.0 + np.asarray(longitude, dtype=float) / 15.0
    day = np.clip(np.floor((local - 0.0) / 24.0).astype(int) + 1, 0, len(events["sq_day_factor"]) - 1)
    factor = np.asarray(events["sq_day_factor"])[day]
    lt = np.mod(local, 24.0)
    amp = events["sq_amplitude_nT"]
    bell = np.exp(-0.5 * ((lt - 11.5) / 2.8) ** 2)
    slope = -(lt - 12.5) / 2.8 * np.exp(-0.5 * ((lt - 12.5) / 2.8) ** 2)
    north = factor * amp["north"] * (bell - 0.15)
    east = factor * amp["east"] * slope
    down = factor * amp["down"] * (np.exp(-0.5 * ((lt - 12.0) / 3.2) ** 2) - 0.15)
    for p in events["pulsations"]:  # a few events, each vectorised over all times
        wave = (
            p["amplitude_nT"]
            * np.exp(-0.5 * ((t - p["t0_s"]) / p["width_s"]) ** 2)
            * np.sin(2 * np.pi * (t - p["t0_s"]) / p["period_s"] + p["phase"])
        )
        north = north + wave * p["direction"][0]
        east = east + wave * p["direction"][1]
        down = down + wave * p["direction"][2]
    for b in events["bays"]:
        bay = -b["amplitude_nT"] * np.exp(-0.5 * ((t - b["t0_s"]) / b["width_s"]) ** 2)
        north = north + bay
        down = down - 0.3 * bay
    return north, east, down


def project_on(field, north, east, down):
    """Projection of a small vector on the unit main-field direction (nT): the first-order
    total-field anomaly (Blakely 1995, Potential Theory in Gravity and Magnetic Applications,
    CUP, sec. 12.1).

    Parameters
    ----------
    field : potfield.fields.magnetic.igrf.IGRFField
        Main field (north, east, down, total).
    north, east, down : array
        The small vector (nT).
    """
    return (north * field.north + east * field.east + down * field.down) / field.total


# --- crustal model -----------------------------------------------------------------------------


def crustal_model(
    rng: np.random.Generator, side: float, datum: float, inc: float, dec: float, intensity: float
) -> dict:
    """Prisms and magnetisations of the crustal model (local coordinates, m from the centre).

    Parameters
    ----------
    side : float
        Side of the (square) survey area (m).
    datum : float
        Height of the terrain base level (m above the ellipsoid); depths are below it.
    inc, dec, intensity : float
        Main-field direction (degrees) and intensity (nT) at the centre (induced magnetisation
        M = chi F / mu0, along F).
    """
    import harmonica as hm

    h_induced = intensity * 1e-9 / common.MU0  # A/m per unit susceptibility
    ue, un, uu = hm.magnetic_angles_to_vec(1.0, inc, dec)
    bodies = []
    prisms, mags = [], []

    # Dyke: strike north-south, dipping 60 deg east, 50 m thick, 8 slabs of 70 m.
    x0 = rng.uniform(-0.25, -0.1) * side
    length = 0.7 * side
    chi_dyke = 0.045
    dip = 60.0
    top = datum - 120.0
    for k in range(8):
        z_top = top - 70.0 * k
        shift = (datum - 120.0 - z_top) / np.tan(np.radians(dip))
        prisms.append([x0 + shift - 25.0, x0 + shift + 25.0, -length / 2, length / 2, z_top - 70.0, z_top])
        mags.append([chi_dyke * h_induced * ue, chi_dyke * h_induced * un, chi_dyke * h_induced * uu])
    bodies.append(
        {
            "name": "dyke",
            "susceptibility_SI": chi_dyke,
            "dip_deg": dip,
            "dip_direction": "east",
            "thickness_m": 50.0,
            "strike": "north-south",
            "east_m": float(x0),
            "length_m": float(length),
            "top_depth_m": 120.0,
            "prisms": 8,
        }
    )

    # Plug: three stacked square prisms, induced plus a remanent magnetisation.
    px, py = rng.uniform(0.1, 0.25) * side, rng.uniform(-0.2, 0.2) * side
    chi_plug = 0.03
    rem_int, rem_inc, rem_dec = 2.5, 45.0, 160.0
    re_, rn, ru = hm.magnetic_angles_to_vec(rem_int, rem_inc, rem_dec)
    radius = max(350.0, 0.05 * side)
    for k, (half, z_top, z_bot) in enumerate(  # noqa: B007
        [
            (0.7 * radius, datum - 200, datum - 450),
            (radius, datum - 450, datum - 1200),
            (1.2 * radius, datum - 1200, datum - 2500),
        ]
    ):
        prisms.append([px - half, px + half, py - half, py + half, z_bot, z_top])
        mags.append(
            [chi_plug * h_induced * ue + re_, chi_plug * h_induced * un + rn, chi_plug * h_induced * uu + ru]
        )
    bodies.append(
        {
            "name": "plug",
            "susceptibility_SI": chi_plug,
            "remanence_A_per_m": rem_int,
            "remanence_inclination_deg": rem_inc,
            "remanence_declination_deg": rem_dec,
            "east_m": float(px),
            "north_m": float(py),
            "radius_m": float(radius),
            "top_depth_m": 200.0,
            "bottom_depth_m": 2500.0,
            "prisms": 3,
        }
    )

    # Basement: 4 x 4 fault blocks with their own top depth and susceptibility.
    nb = 4
    margin = 0.25 * side
    edges = np.linspace(-side / 2 - margin, side / 2 + margin, nb + 1)
    tops = rng.uniform(700.0, 1400.0, (nb, nb))
    chis = rng.uniform(0.004, 0.015, (nb, nb))
    for i in range(nb):
        for j in range(nb):
            prisms.append(
                [edges[j], edges[j + 1], edges[i], edges[i + 1], datum - 4000.0, datum - tops[i, j]]
            )
            c = chis[i, j]
            mags.append([c * h_induced * ue, c * h_induced * un, c * h_induced * uu])
    bodies.append(
        {
            "name": "basement",
            "blocks": nb * nb,
            "edges_m": edges.tolist(),
            "top_depth_m": np.round(tops, 1).tolist(),
            "susceptibility_SI": np.round(chis, 5).tolist(),
            "bottom_depth_m": 4000.0,
        }
    )
    mags = np.asarray(mags)
    return {
        "prisms": np.asarray(prisms, dtype=float),
        "magnetization": (mags[:, 0], mags[:, 1], mags[:, 2]),
        "bodies": bodies,
    }


def crustal_field(model: dict, east_local, north_local, height):
    """Magnetic vector (east, north, up; nT) of the prism model (harmonica.prism_magnetic)."""
    import harmonica as hm

    return hm.prism_magnetic(
        (east_local, north_local, height), model["prisms"], model["magnetization"], field="b"
    )


def crustal_anomaly(model: dict, east_local, north_local, height, field):
    """Total-field anomaly ``b . F_hat`` (nT) of the model, F_hat from an IGRF result."""
    be, bn, bu = crustal_field(model, east_local, north_local, height)
    return project_on(field, bn, be, -bu)


# --- flight geometry ---------------------------------------------------------------------------


def plan_lines(readings: int) -> dict:
    """Size of the (square) area and the line plan for about ``readings`` samples."""
    step = SPEED / RATE_HZ
    density = 1.0 / LINE_SPACING + 1.0 / TIE_SPACING  # line metres per square metre
    if readings < SMALL_PLAN_BELOW:
        # side^2 / LINE_SPACING (traverses) + 3 side (ties) = readings x step, solved for side
        # and rounded down to an even number of line spacings (at least 4 traverse gaps).
        a, b = 1.0 / LINE_SPACING, 3.0
        side = (-b + np.sqrt(b * b + 4.0 * a * readings * step)) / (2.0 * a)
        side = max(np.floor(side / (2 * LINE_SPACING)) * 2 * LINE_SPACING, 4 * LINE_SPACING)
        tie_spacing = side / 2.0
    else:
        side = float(np.sqrt(readings * step / density))
        side = max(round(side / TIE_SPACING) * TIE_SPACING, 2 * TIE_SPACING)
        tie_spacing = TIE_SPACING
    n_trav = int(round(side / LINE_SPACING)) + 1
    n_tie = int(round(side / tie_spacing)) + 1
    return {"side_m": float(side), "traverses": n_trav, "ties": n_tie, "tie_spacing_m": float(tie_spacing)}


def make_magnetic(directory: Path, readings: int | None = None, seed: int = 0) -> Path:
    """Write the airborne magnetic demo survey folder (see the module docstring).

    Parameters
    ----------
    directory : Path
        Survey folder to create or overwrite (survey.toml, raw/, truth/, README.md).
    readings : int, optional
        Approximate number of readings, 1,000 to 10,000,000 (default 30,000).
    seed : int
        Seed of ``numpy.random.default_rng``; the same seed gives the same bytes.

    Returns
    -------
    Path
        The survey folder.
    """
    from ..fields.magnetic.igrf import igrf

    readings = DEFAULT_READINGS if readings is None else int(readings)
    if not MIN_READINGS <= readings <= MAX_READINGS:
        from ..errors import ConfigError

        raise ConfigError(
            f"--readings {readings} is outside {MIN_READINGS:,}..{MAX_READINGS:,}",
            fix="choose a number of readings in that range",
        )
    directory, raw, truth = common.survey_folders(directory)
    fwd, inv = common.transformers()
    e0, n0 = common.centre_projected()

    plan = plan_lines(readings)
    side = plan["side_m"]
    geo = rng_for(seed, "mag-geometry")
    terrain = common.make_terrain(
        rng_for(seed, "mag-terrain"), 0.75 * side, base=260.0, relief=min(160.0, 40.0 + side / 60.0)
    )

    # Lines: traverses east-west (numbered 1010, 1020, ...), ties north-south (9010, ...).
    n_trav, n_tie = plan["traverses"], plan["ties"]
    offsets = np.concatenate(
        [-side / 2 + LINE_SPACING * np.arange(n_trav), -side / 2 + plan["tie_spacing_m"] * np.arange(n_tie)]
    )
    is_tie = np.r_[np.zeros(n_trav, bool), np.ones(n_tie, bool)]
    names = np.r_[1010 + 10 * np.arange(n_trav), 9010 + 10 * np.arange(n_tie)].astype(str)
    n_lines = names.size
    direction = np.where(np.arange(n_lines) % 2 == 0, 1.0, -1.0)  # alternate flight directions
    wind = geo.normal(0.0, 5.0, 2)  # wind (east, north) m/s: ground speed differs per direction
    heading_e = np.where(is_tie, 0.0, direction)
    heading_n = np.where(is_tie, direction, 0.0)
    speed = SPEED + wind[0] * heading_e + wind[1] * heading_n + geo.normal(0.0, 0.8, n_lines)
    # Every line runs one traverse spacing past the area on both ends, so the outermost
    # traverses cross every tie even with track wander (common practice).
    margin = LINE_SPACING
    counts = np.floor((side + 2 * margin) / (speed / RATE_HZ)).astype(np.int64) + 1
    total = int(counts.sum())
    line_idx = np.repeat(np.arange(n_lines), counts)
    starts = np.r_[0, np.cumsum(counts)[:-1]]
    k = np.arange(total) - starts[line_idx]
    along = speed[line_idx] * k / RATE_HZ  # m from the line start
    coord_along = np.where(direction[line_idx] > 0, -side / 2 - margin + along, side / 2 + margin - along)
    wander = common.fourier_wander(geo, line_idx, along, n_lines, 9.0, (3200.0, 1300.0, 520.0))
    cross = offsets[line_idx] + wander
    tie_r = is_tie[line_idx]
    east_l = np.where(tie_r, cross, coord_along)
    north_l = np.where(tie_r, coord_along, cross)

    # Schedule: lines in order, 80-160 s turns, flights of at most 4.5 h, one flight a day.
    turns = geo.uniform(80.0, 160.0, n_lines)
    line_start = np.zeros(n_lines)
    flight_of = np.zeros(n_lines, dtype=int)
    windows = []
    cursor, flight, flight_start = 0.0, 0, 0.0
    for i in range(n_lines):  # loop over lines, not readings
        duration = counts[i] / RATE_HZ
        if cursor + duration - flight_start > MAX_FLIGHT_S and cursor > flight_start:
            windows.append((flight_start, cursor))
            flight += 1
            flight_start = cursor = 86400.0 * flight
        line_start[i] = cursor
        flight_of[i] = flight
        cursor += duration + turns[i]
    windows.append((flight_start, cursor))
    seconds = line_start[line_idx] + k / RATE_HZ

    # Gaps: about one line in four loses 2-6 s of recording in its middle.
    has_gap = geo.random(n_lines) < 0.25
    gap_start = (geo.uniform(0.2, 0.8, n_lines) * counts).astype(np.int64)
    gap_len = geo.integers(20, 61, n_lines)
    in_gap = has_gap[line_idx] & (k >= gap_start[line_idx]) & (k < gap_start[line_idx] + gap_len[line_idx])
    keep = ~in_gap

    # Drape: smoothed terrain along the track + clearance + smooth drape error + two climbs.
    ground = common.terrain_height(east_l, north_l, terrain)
    smooth = np.empty_like(ground)
    bounds = np.r_[starts, total]
    for i in range(n_lines):  # loop over lines
        a, b = bounds[i], bounds[i + 1]
        smooth[a:b] = gaussian_filter1d(ground[a:b], sigma=45.0, mode="nearest")
    drape_err = common.fourier_wander(geo, line_idx, along, n_lines, 4.0, (2600.0, 900.0))
    climbs = geo.choice(n_lines, size=2, replace=False)
    climb = np.zeros(total)
    for c in climbs:
        centre = geo.uniform(0.3, 0.7) * side
        sel = line_idx == c
        climb[sel] = 22.0 * np.exp(-0.5 * ((along[sel] - centre) / 250.0) ** 2)
    height = np.maximum(smooth + CLEARANCE, ground + 55.0) + drape_err + climb

    # Select the recorded readings (and free the full-track arrays).
    line_idx, k, seconds = line_idx[keep], k[keep], seconds[keep]
    east_l, north_l, height, ground = east_l[keep], north_l[keep], height[keep], ground[keep]
    del along, coord_along, wander, cross, tie_r, in_gap, keep, smooth, drape_err, climb
    n = line_idx.size
    times = FIRST_FLIGHT + np.round(seconds * 1e9).astype("int64").astype("timedelta64[ns]")
    lon, lat = inv.transform(e0 + east_l, n0 + north_l)
    lon = np.round(lon, 7)
    lat = np.round(lat, 7)
    height = np.round(height, 2)
    # The field is computed at the written (rounded) coordinates so the file is the truth.
    east_p, north_p = fwd.transform(lon, lat)
    east_l, north_l = east_p - e0, north_p - n0
    del east_p, north_p

    mid_time = FIRST_FLIGHT + np.timedelta64(int(np.median(seconds) * 1e9), "ns")
    centre_field = igrf(common.CENTRE_LON, common.CENTRE_LAT, terrain["base_m"] + CLEARANCE, mid_time)
    inc, dec, intensity = (
        float(centre_field.inclination),
        float(centre_field.declination),
        float(centre_field.total),
    )
    model = crustal_model(rng_for(seed, "mag-crust"), side, terrain["base_m"], inc, dec, intensity)
    ev = external_events(rng_for(seed, "mag-external"), windows)
    igrf_total, crustal, external = np.empty(n), np.empty(n), np.empty(n)
    for a in range(0, n, CHUNK):  # chunks of readings bound the memory of the field synthesis
        sl = slice(a, a + CHUNK)
        main = igrf(lon[sl], lat[sl], height[sl], times[sl])
        igrf_total[sl] = main.total
        crustal[sl] = crustal_anomaly(model, east_l[sl], north_l[sl], height[sl], main)
        xn, xe, xd = external_vector(seconds[sl], lon[sl], ev)
        external[sl] = project_on(main, xn, xe, xd)
    del main, xn, xe, xd

    noise_rng = rng_for(seed, "mag-noise")
    level = np.round(noise_rng.normal(0.0, 2.5, n_lines), 3)
    level_r = level[line_idx]
    noise = noise_rng.normal(0.0, 0.05, n)
    spike = np.zeros(n)
    n_spikes = max(3, n // 4000)
    where = noise_rng.choice(n, size=n_spikes, replace=False)
    spike[where] = noise_rng.choice([-1.0, 1.0], n_spikes) * noise_rng.uniform(5.0, 40.0, n_spikes)

    tmi = np.round(igrf_total + crustal + external + level_r + noise + spike, 3)
    noise = tmi - (igrf_total + crustal + external + level_r + spike)  # includes the rounding

    line_names = names[line_idx]
    fid = np.round(seconds * RATE_HZ).astype(np.int64) % 10_000_000
    survey = pd.DataFrame(
        {
            "line": line_names,
            "fiducial": fid,
            "time_utc": common.iso_times(times, "ms"),
            "longitude": lon,
            "latitude": lat,
            "height_m": height,
            "total_field_nT": tmi,
        }
    )
    common.write_table(
        raw / SURVEY_FILE, survey, {"longitude": 7, "latitude": 7, "height_m": 2, "total_field_nT": 3}
    )

    truth_table = pd.DataFrame(
        {
            "source_file": SURVEY_FILE,
            "source_row": np.arange(n, dtype=np.int64) + 2,  # line in the file (header = line 1)
            "line": line_names,
            "crustal_anomaly": crustal,
            "igrf_total": igrf_total,
            "external": external,
            "level_error": level_r,
            "noise": noise,
            "spike": spike,
            "terrain_height": ground,
        }
    )
    common.write_table(
        truth / "readings_truth.csv",
        truth_table,
        {
            "crustal_anomaly": 4,
            "igrf_total": 4,
            "external": 4,
            "level_error": 3,
            "noise": 4,
            "spike": 3,
            "terrain_height": 2,
        },
    )

    # Base station inside the area (1 s), and a distant observatory (IAGA-2002, 1 min).
    base_local = (-0.3 * side, -0.35 * side)
    base_lon, base_lat = inv.transform(e0 + base_local[0], n0 + base_local[1])
    base_lon, base_lat = round(float(base_lon), 6), round(float(base_lat), 6)
    base_e, base_n = fwd.transform(base_lon, base_lat)
    base_h = round(float(common.terrain_height(base_e - e0, base_n - n0, terrain)) + 2.0, 2)
    base_sec = np.concatenate([np.arange(np.floor(a) - 1200.0, np.ceil(b) + 1200.0, 1.0) for a, b in windows])
    base_times = FIRST_FLIGHT + (base_sec * 1e9).astype("int64").astype("timedelta64[ns]")
    base_main = igrf(base_lon, base_lat, base_h, base_times)
    base_crust = crustal_anomaly(
        model,
        np.array([base_e - e0]),
        np.array([base_n - n0]),
        np.array([base_h]),
        igrf(base_lon, base_lat, base_h, mid_time),
    )[0]
    bn_, be_, bd_ = external_vector(base_sec, base_lon, ev)
    base_ext = project_on(base_main, bn_, be_, bd_)
    base_noise = rng_for(seed, "mag-base").normal(0.0, 0.02, base_sec.size)
    base_value = np.round(base_main.total + base_crust + base_ext + base_noise, 2)
    day = base_times.astype("datetime64[D]")
    base = pd.DataFrame(
        {
            "date": np.datetime_as_string(day, unit="D"),
            "seconds_of_day": np.round((base_times - day).astype("int64") / 1e9, 1),
            "base_total_field_nT": base_value,
        }
    )
    common.write_table(raw / BASE_FILE, base)
    base_truth = pd.DataFrame(
        {
            "time": common.iso_times(base_times, "s"),
            "igrf_total": base_main.total,
            "crustal_anomaly": base_crust,
            "external": base_ext,
            "noise": base_value - (base_main.total + base_crust + base_ext),
        }
    )
    common.write_table(
        truth / "base_truth.csv",
        base_truth,
        {"igrf_total": 4, "crustal_anomaly": 4, "external": 4, "noise": 4},
    )

    obs_files = write_observatory_days(raw, windows, ev, seed)

    # True crustal anomaly grid at the median flight height.
    grid_h = float(np.median(height))
    cell = max(50.0, round(side / 250.0 / 10.0) * 10.0)
    ge = np.arange(-side / 2, side / 2 + cell / 2, cell)
    gn = np.arange(-side / 2, side / 2 + cell / 2, cell)
    GE, GN = np.meshgrid(ge, gn)
    glon, glat = inv.transform(e0 + GE, n0 + GN)
    gfield = igrf(glon, glat, grid_h, mid_time)
    ganom = crustal_anomaly(
        model,
        GE.ravel(),
        GN.ravel(),
        np.full(GE.size, grid_h),
        igrf(glon.ravel(), glat.ravel(), grid_h, mid_time),
    ).reshape(GE.shape)
    del gfield
    grid = make_grid(
        e0 + ge,
        n0 + gn,
        np.round(ganom, 4),
        name="crustal_anomaly",
        units="nT",
        long_name=f"true crustal total-field anomaly at {grid_h:.1f} m (invented data)",
        history="potfield.demo.magnetic true crustal anomaly",
    )
    grid.attrs["comment"] = common.DISCLAIMER
    grid.attrs["height_m"] = grid_h
    write_netcdf(truth / "crustal_anomaly.nc", grid, common.OUTPUT_CRS)

    params = {
        "disclaimer": common.DISCLAIMER,
        "seed": int(seed),
        "readings": int(n),
        "requested_readings": int(readings),
        "area": {
            "name": common.AREA_NAME,
            "centre_lon": common.CENTRE_LON,
            "centre_lat": common.CENTRE_LAT,
            "crs": common.OUTPUT_CRS,
            "centre_easting": e0,
            "centre_northing": n0,
            "side_m": side,
        },
        "design": {
            "line_spacing_m": LINE_SPACING,
            "tie_spacing_m": plan["tie_spacing_m"],
            "traverse_direction": "east-west",
            "tie_direction": "north-south",
            "speed_m_s": SPEED,
            "sample_rate_hz": RATE_HZ,
            "clearance_m": CLEARANCE,
            "wind_east_north_m_s": np.round(wind, 3).tolist(),
            "traverses": n_trav,
            "ties": n_tie,
            "flights": len(windows),
            "climb_lines": [str(names[c]) for c in climbs],
        },
        "lines": {
            str(names[i]): {
                "level_error_nT": float(level[i]),
                "type": "tie" if is_tie[i] else "traverse",
                "speed_m_s": round(float(speed[i]), 3),
                "gap": bool(has_gap[i]),
            }
            for i in range(n_lines)
        },
        "main_field_at_centre": {
            "time": str(mid_time.astype("datetime64[s]")) + "Z",
            "inclination_deg": inc,
            "declination_deg": dec,
            "total_nT": intensity,
        },
        "bodies": model["bodies"],
        "terrain": terrain,
        "external": ev,
        "spikes": int(n_spikes),
        "noise_sigma_nT": 0.05,
        "base_station": {
            "file": f"raw/{BASE_FILE}",
            "longitude": base_lon,
            "latitude": base_lat,
            "height_m": base_h,
            "crustal_anomaly_nT": float(base_crust),
        },
        "observatory": {"code": OBSERVATORY_CODE, **OBSERVATORY, "files": obs_files},
        "grid": {"file": "truth/crustal_anomaly.nc", "height_m": grid_h, "cell_m": cell},
        "truth_columns": {
            "source_file/source_row": "file name and line number in it (header = line 1)",
            "crustal_anomaly": "b . F_hat of the prism model (nT)",
            "igrf_total": "IGRF-14 total intensity at the reading (nT, potfield.fields.magnetic.igrf)",
            "external": "external variation projected on F_hat (nT)",
            "level_error": "constant per-line level error (nT)",
            "noise": "sensor noise incl. rounding to 0.001 nT (nT)",
            "spike": "spike (nT, 0 where none)",
            "terrain_height": "ground height below the aircraft (m above the ellipsoid)",
            "sum": "total_field_nT = igrf_total + crustal_anomaly + external + level_error + noise + spike",
        },
    }
    common.write_params(truth / "parameters.json", params)
    write_text(directory / "survey.toml", _survey_toml(base_lon, base_lat, obs_files))
    common.write_readme(directory / "README.md", _readme(n, side, len(windows)))
    return directory


def write_observatory_days(raw: Path, windows, events: dict, seed: int) -> list[str]:
    """IAGA-2002 one-minute XYZF files (one per UTC day of the survey) at the distant
    fictional observatory: IGRF-14 plus the same regional external variation."""
    from ..fields.magnetic.igrf import igrf
    from ..io.iaga2002 import write_iaga2002

    first = FIRST_FLIGHT.astype("datetime64[D]")
    start_s = (first - FIRST_FLIGHT).astype("timedelta64[s]").astype(float)
    last_day = int(np.floor((windows[-1][1] - start_s) / 86400.0))
    rng = rng_for(seed, "mag-observatory")
    files = []
    for d in range(last_day + 1):  # loop over days
        minutes = np.arange(1440)
        sec = start_s + 86400.0 * d + 60.0 * minutes
        times = FIRST_FLIGHT + (sec * 1e9).astype("int64").astype("timedelta64[ns]")
        main = igrf(OBSERVATORY["lon"], OBSERVATORY["lat"], OBSERVATORY["elevation"], times)
        xn, xe, xd = external_vector(sec, OBSERVATORY["lon"], events)
        x = main.north + xn + rng.normal(0, 0.1, sec.size)
        y = main.east + xe + rng.normal(0, 0.1, sec.size)
        z = main.down + xd + rng.normal(0, 0.1, sec.size)
        frame = pd.DataFrame({"time": times, "X": np.round(x, 2), "Y": np.round(y, 2), "Z": np.round(z, 2)})
        frame["F"] = np.round(np.sqrt(frame["X"] ** 2 + frame["Y"] ** 2 + frame["Z"] ** 2), 2)
        day = str(first + np.timedelta64(d, "D"))
        name = f"{OBSERVATORY_CODE.lower()}{day.replace('-', '')}vmin.min"
        write_iaga2002(raw / name, frame, header=_obs_header(), comments=_obs_comments())
        files.append(f"raw/{name}")
    return files


def _obs_header() -> dict:
    return {
        "source": "potfield demo (invented data)",
        "station_name": OBSERVATORY["name"],
        "iaga_code": OBSERVATORY_CODE,
        "latitude": OBSERVATORY["lat"],
        "longitude": OBSERVATORY["lon"],
        "elevation": OBSERVATORY["elevation"],
        "reported": "XYZF",
        "sensor_orientation": "XYZ",
        "digital_sampling": "1 second",
        "interval_type": "1-minute (instantaneous)",
        "data_type": "variation",
    }


def _obs_comments() -> list[str]:
    return [
        "Invented data: a fictional observatory made by potfield.demo.",
        "IGRF-14 main field plus a synthetic external variation and noise.",
        f"Code {OBSERVATORY_CODE} is fictional; no real station is meant.",
    ]


def _survey_toml(base_lon: float, base_lat: float, obs_files: list[str]) -> str:
    return f"""# Demo airborne magnetic survey. {common.DISCLAIMER}
# Made by potfield.demo.make_demo("magnetic"); the true components are in truth/ (never read
# by the pipeline).

{common.survey_tables("airborne magnetic", "magnetic", SURVEY_FILE)}

[input.columns]
line = "line"
time = "time_utc"
longitude = "longitude"
latitude = "latitude"
height = "height_m"
total_field = "total_field_nT"

[input.units]
total_field = "nT"
height = "m"

[input.time]
format = "iso"

[lines]
# Tie lines are numbered 9010, 9020, ...; traverse lines 1010, 1020, ...
tie_min = 9000

[clean]
spike_min = 2.0

[diurnal]
datum = "median"

[[diurnal.bases]]
name = "airstrip base"
file = "raw/{BASE_FILE}"
format = "delimited"
longitude = {base_lon}
latitude = {base_lat}
delimiter = ","

[diurnal.bases.columns]
date = "date"
time = "seconds_of_day"
total_field = "base_total_field_nT"

[diurnal.bases.units]
total_field = "nT"

[diurnal.bases.time]
format = "date_seconds"

[reference]
# IGRF-14 at each reading's time and position.

[level]
traverse_model = "constant"

[grid]
spacing_m = 50.0
"""


def _readme(n: int, side: float, flights: int) -> str:
    return f"""# Demo: airborne magnetic survey over {common.AREA_NAME} (invented data)

{common.DISCLAIMER}

Made by `potfield demo magnetic` (`potfield.demo.make_demo("magnetic", ..., seed=0)`); the same
seed gives the same bytes.

## What is in it

- `raw/{SURVEY_FILE}`: {n:,} total-field readings at 10 Hz on east-west traverse lines
  (200 m apart, 1010, 1020, ...) and north-south tie lines (2000 m apart, 9010, 9020, ...) over a
  {side / 1000:.1f} km square, flown in alternating directions at about 70 m/s, {flights}
  flight(s), draped 80 m over a synthetic terrain. Columns: line, fiducial,
  time_utc (ISO 8601), longitude, latitude (WGS 84), height_m (m above the ellipsoid),
  total_field_nT.
- `raw/{BASE_FILE}`: the base-station record at the airstrip, 1 s (date, seconds_of_day,
  base_total_field_nT).
- `raw/{OBSERVATORY_CODE.lower()}*vmin.min`: a distant fictional observatory, IAGA-2002, 1-minute XYZF
  (an alternative remote reference; not used by the default configuration).
- `truth/readings_truth.csv`: per reading (keyed by source_file, source_row = line in the file)
  the true crustal anomaly, IGRF total, external (diurnal) variation, level error, noise and
  spike; total_field_nT is their sum.
- `truth/base_truth.csv`, `truth/parameters.json` (bodies, terrain, events, per-line level
  errors), `truth/crustal_anomaly.nc` (true crustal anomaly at the median flight height).

## The geology (invented)

A north-south dyke dipping 60 degrees east (a linear high with an asymmetric low on its
west flank), an intrusive plug whose remanent magnetisation points nearly against the present
field (a strong negative anomaly), and a faulted basement of 16 blocks at 0.7-1.4 km depth
(broad steps at the block edges).

## What to look at in the results

- The diurnal correction should remove the daily variation (about 20-40 nT over the flight)
  and the pulsations: compare `diurnal` with truth `external` (difference = the base's constant
  crustal value plus the datum).
- Levelling should recover the per-line level errors (a few nT): compare the level corrections
  with `-level_error` from truth, up to one constant.
- The final grid should match `truth/crustal_anomaly.nc` to well under 1 nT away from the edges;
  the spikes should be flagged by the clean stage.
"""
