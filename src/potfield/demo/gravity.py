"""Ground gravity demo survey with known truth.

All data are invented (fictional area, see :mod:`potfield.demo.common`). The scenario:

* about 256 stations on a jittered 750 m grid over a 12 km square, read in loops that start and
  end at one of two base stations (BASE-A, BASE-B; their absolute values go into survey.toml),
  the first loop tying the bases (A, B, ...) and the last one again (..., A, B, A or ..., B, A,
  B), a few repeat occupations, over several days;
* a synthetic terrain given as a DEM in raw/ (NetCDF-CF, 250 m cells) that covers the survey
  plus a 21 km margin (enough for a 20 km terrain radius); the true topography IS that DEM (flat
  cell tops at the cell heights, density 2670 kg/m^3) continued by a plateau at the DEM's rim
  height out to 166.7 km, with every prism lowered by the Earth-curvature drop d^2 / (2 R) seen
  from each station (LaFehr 1991, Geophysics 56:1179);
* bodies (harmonica right-rectangular prisms; Nagy et al. 2000, J. Geodesy 74:552): a dense
  intrusion (+250 kg/m^3) and a low-density sedimentary basin (-300 kg/m^3), plus a planar
  regional trend;
* true absolute gravity at each station mark = normal gravity at its ellipsoidal height
  (WGS84 closed form by boule; Li and Goetze 2001, Geophysics 66:1660) - the atmospheric
  correction (Hinze et al. 2005, Geophysics 70:J25, eq. 3; the normal field includes the
  atmosphere's mass) + topography + bodies + regional;
* the meter reading (mGal on the meter's own level) = g_true - instrument height x 0.3086 mGal/m
  (common practice free-air gradient) + the Earth tide the meter sees (Longman 1959, J. Geophys.
  Res. 64:2351, potfield.fields.gravity.tides.longman_gravity with factor 1.16) - a meter offset + drift
  (linear per day, 0.01-0.03 mGal/h) + one tare (0.08 mGal, in the middle of a loop of the
  second day, after which the crew rereads the last two stations, so that the network
  adjustment ties the loop's two segments) + noise (5 uGal); converted to
  counter units through the inverse of the calibration (interval) table in raw/ (Hinze, von
  Frese and Saad 2013, Gravity and Magnetic Exploration, CUP);
* recorded station heights carry realistic errors (a few cm, a few up to 0.1 m).

The true complete Bouguer anomaly (density 2670) at each station is exactly ``bodies +
regional``.
"""

from __future__ import annotations

from pathlib import Path

import numba
import numpy as np
import pandas as pd
from choclo.prism import kernel_u

from ..io.atomic import write_text
from ..io.grids import make_grid, write_netcdf
from . import common
from .common import rng_for

SURVEY_FILE = "gravity_readings.csv"
CAL_FILE = "calibration.csv"
DEM_FILE = "dem.nc"
SIDE = 12_000.0
STATION_SPACING = 750.0
DEM_CELL = 250.0
DEM_MARGIN = 21_000.0
FAR_RADIUS = 166_700.0
FAR_CELL = 4000.0
EARTH_RADIUS = 6_371_000.0
DENSITY = 2670.0
FREE_AIR_GRADIENT = 0.3086
GRAVIMETRIC_FACTOR = 1.16
#: Reading noise (mGal): a modern meter's repeatability, a few microgal (common practice).
NOISE = 0.005
FIRST_DAY = np.datetime64("2025-03-03T21:40:00", "ns")  # about 07:30 local solar time


def atmospheric_correction(height):
    """Atmospheric correction (mGal) of Hinze et al. (2005), Geophysics 70(4):J25, eq. 3:
    ``0.874 - 9.9e-5 h + 3.56e-9 h^2`` (h in m)."""
    h = np.asarray(height, dtype=float)
    return 0.874 - 9.9e-5 * h + 3.56e-9 * h**2


def calibration_table(rng: np.random.Generator) -> pd.DataFrame:
    """A spring-meter interval table: counter every 100 units from 0 to 7000, the milligal value
    at each and the factor (mGal per counter unit) of the interval starting there."""
    counter = np.arange(0.0, 7001.0, 100.0)
    wiggle = 0.0004 * np.sin(2 * np.pi * counter / 2300.0 + rng.uniform(0, 2 * np.pi))
    factor = np.round(1.0372 + wiggle + rng.normal(0, 0.00005, counter.size), 5)
    mgal = np.round(np.r_[0.0, np.cumsum(100.0 * factor[:-1])], 3)
    return pd.DataFrame({"counter": counter, "mgal": mgal, "factor": factor})


def mgal_to_counter(mgal, table: pd.DataFrame) -> np.ndarray:
    """Inverse of the interval-table calibration (``mGal = M_i + (c - C_i) F_i``)."""
    m = np.asarray(mgal, dtype=float)
    c_tab, m_tab, f_tab = (table[k].to_numpy(dtype=float) for k in ("counter", "mgal", "factor"))
    i = np.clip(np.searchsorted(m_tab, m, side="right") - 1, 0, c_tab.size - 2)
    return c_tab[i] + (m - m_tab[i]) / f_tab[i]


def counter_to_mgal(counter, table: pd.DataFrame) -> np.ndarray:
    """The interval-table calibration (common practice; Hinze et al. 2013)."""
    c = np.asarray(counter, dtype=float)
    c_tab, m_tab, f_tab = (table[k].to_numpy(dtype=float) for k in ("counter", "mgal", "factor"))
    i = np.clip(np.searchsorted(c_tab, c, side="right") - 1, 0, c_tab.size - 2)
    return m_tab[i] + (c - c_tab[i]) * f_tab[i]


#: Beyond this horizontal distance (m) a topography prism is taken as a vertical line mass.
LINE_MASS_DISTANCE = 3000.0
#: Gravitational constant (m^3 kg^-1 s^-2; CODATA 2018).
G = 6.6743e-11


@numba.njit(cache=True)
def _prism_up(x, y, z, west, east, south, north, bottom, top):  # pragma: no cover - compiled
    """Sum of choclo's Nagy et al. (2000) upward kernel over the 8 prism corners (shifted
    coordinates, origin at the observation point): g_up = G rho * this."""
    result = 0.0
    for i in range(2):
        se = east - x if i == 0 else west - x
        for j in range(2):
            sn = north - y if j == 0 else south - y
            for k in range(2):
                su = top - z if k == 0 else bottom - z
                r = np.sqrt(se * se + sn * sn + su * su)
                result += (-1.0) ** (i + j + k) * kernel_u(se, sn, su, r)
    return result


@numba.njit(parallel=True, cache=True)
def _topography_kernel(
    x, y, z, west, east, south, north, top, density, far_radius, earth_radius, line_distance, out
):  # pragma: no cover - compiled
    for i in numba.prange(x.size):
        total = 0.0
        for j in range(west.size):
            ce = 0.5 * (west[j] + east[j])
            cn = 0.5 * (south[j] + north[j])
            d2 = (ce - x[i]) ** 2 + (cn - y[i]) ** 2
            if d2 > far_radius * far_radius:
                continue
            drop = d2 / (2.0 * earth_radius)
            bottom, upper = -drop, top[j] - drop
            if d2 < line_distance * line_distance:
                total -= (
                    G
                    * density[j]
                    * _prism_up(x[i], y[i], z[i], west[j], east[j], south[j], north[j], bottom, upper)
                )
            else:
                lam = G * density[j] * (east[j] - west[j]) * (north[j] - south[j])
                total += lam * (
                    1.0 / np.sqrt(d2 + (z[i] - upper) ** 2) - 1.0 / np.sqrt(d2 + (z[i] - bottom) ** 2)
                )
        out[i] = total * 1e5


def topography_gravity(east, north, height, dem_e, dem_n, dem_h, far_h: float) -> np.ndarray:
    """Vertical attraction (mGal, downward positive) of the topography at stations.

    The DEM cells are prisms from the ellipsoid (0 m) to the cell height; beyond the DEM a
    plateau of height ``far_h`` in 4 km cells reaches 166.7 km. Every prism is lowered by the
    curvature drop d^2 / (2 R) of its centre as seen from the station (LaFehr 1991, Geophysics
    56:1179), so the topography lies on a sphere rather than the station's tangent plane.
    Prisms nearer than 3 km: the closed form of Nagy et al. (2000, J. Geodesy 74:552) as coded
    in choclo (harmonica's kernel library); farther: the exact attraction of a vertical line
    mass, ``G lambda [1/r_top - 1/r_bottom]`` (its error against the prism is of relative order
    (cell / distance)^2 / 24, below 1e-3 here; common practice).
    """
    half = DEM_CELL / 2
    E, N = np.meshgrid(dem_e, dem_n)
    cells = np.column_stack([E.ravel() - half, E.ravel() + half, N.ravel() - half, N.ravel() + half])
    tops = dem_h.ravel()
    # The far plateau: 4 km cells covering +-FAR_RADIUS minus the DEM's footprint.
    lo_e, hi_e = dem_e[0] - half, dem_e[-1] + half
    lo_n, hi_n = dem_n[0] - half, dem_n[-1] + half
    centre_e, centre_n = 0.5 * (lo_e + hi_e), 0.5 * (lo_n + hi_n)
    far_edges = np.arange(-FAR_RADIUS - 8000.0, FAR_RADIUS + 8000.0 + 1, FAR_CELL)
    FW, FS = np.meshgrid(far_edges[:-1], far_edges[:-1])
    fw, fs = FW.ravel() + centre_e, FS.ravel() + centre_n
    # Far cells that straddle the DEM edge are clipped to the part outside (4 pieces at most).
    far = []
    for w, s in zip(fw, fs):  # loop over ~7000 coarse cells (geometry only, no readings)
        box = (w, w + FAR_CELL, s, s + FAR_CELL)
        if box[1] <= lo_e or box[0] >= hi_e or box[3] <= lo_n or box[2] >= hi_n:
            far.append(box)
            continue
        if box[0] < lo_e:
            far.append((box[0], lo_e, box[2], box[3]))
        if box[1] > hi_e:
            far.append((hi_e, box[1], box[2], box[3]))
        mid_w, mid_e = max(box[0], lo_e), min(box[1], hi_e)
        if mid_e > mid_w:
            if box[2] < lo_n:
                far.append((mid_w, mid_e, box[2], lo_n))
            if box[3] > hi_n:
                far.append((mid_w, mid_e, hi_n, box[3]))
    far = np.asarray(far, dtype=float)
    all_cells = np.ascontiguousarray(np.vstack([cells, far]))
    all_tops = np.ascontiguousarray(np.r_[tops, np.full(far.shape[0], far_h)])
    out = np.empty(np.size(east))
    _topography_kernel(
        np.ascontiguousarray(np.ravel(east), dtype=float),
        np.ascontiguousarray(np.ravel(north), dtype=float),
        np.ascontiguousarray(np.ravel(height), dtype=float),
        all_cells[:, 0].copy(),
        all_cells[:, 1].copy(),
        all_cells[:, 2].copy(),
        all_cells[:, 3].copy(),
        all_tops,
        np.full(all_tops.size, DENSITY),
        FAR_RADIUS,
        EARTH_RADIUS,
        LINE_MASS_DISTANCE,
        out,
    )
    return out


def body_model(rng: np.random.Generator, datum: float) -> dict:
    """Density-contrast prisms (local coordinates, m) and the planar regional trend.

    Parameters
    ----------
    rng : numpy.random.Generator
    datum : float
        Height (m above the ellipsoid) the body depths are measured from.

    Returns
    -------
    dict
        ``prisms`` (west, east, south, north, bottom, top), ``contrast`` (kg/m^3), ``regional``
        (mGal, mGal/km) and a JSON-able ``bodies`` description.
    """
    ix, iy = rng.uniform(-0.25, 0.0, 2) * SIDE
    bx, by = rng.uniform(0.05, 0.25, 2) * SIDE
    prisms = np.array(
        [
            [ix - 900.0, ix + 900.0, iy - 1200.0, iy + 1200.0, datum - 2500.0, datum - 400.0],
            [bx - 2200.0, bx + 2200.0, by - 1600.0, by + 1600.0, datum - 900.0, datum - 100.0],
            [bx - 1200.0, bx + 1200.0, by - 800.0, by + 800.0, datum - 1500.0, datum - 900.0],
        ]
    )
    contrast = np.array([250.0, -300.0, -300.0])
    regional = {
        "constant_mGal": -18.0,
        "east_mGal_per_km": float(rng.uniform(0.3, 0.6)),
        "north_mGal_per_km": float(rng.uniform(-0.3, 0.3)),
    }
    return {
        "prisms": prisms,
        "contrast": contrast,
        "regional": regional,
        "bodies": [
            {
                "name": "dense intrusion",
                "density_contrast_kg_m3": 250.0,
                "prism_local_m": prisms[0].round(1).tolist(),
            },
            {
                "name": "sedimentary basin (two prisms)",
                "density_contrast_kg_m3": -300.0,
                "prisms_local_m": prisms[1:].round(1).tolist(),
            },
        ],
    }


def bodies_gravity(model: dict, east_l, north_l, height) -> np.ndarray:
    """Downward attraction (mGal) of the bodies: harmonica.prism_gravity, the closed form of
    Nagy et al. (2000, J. Geodesy 74:552)."""
    import harmonica as hm

    return hm.prism_gravity((east_l, north_l, height), model["prisms"], model["contrast"], field="g_z")


def regional_gravity(model: dict, east_l, north_l) -> np.ndarray:
    """The planar regional trend (mGal) at local coordinates (m from the area centre)."""
    r = model["regional"]
    return (
        r["constant_mGal"]
        + r["east_mGal_per_km"] * np.asarray(east_l) / 1000.0
        + r["north_mGal_per_km"] * np.asarray(north_l) / 1000.0
    )


def _loops(rng: np.random.Generator, n_stations: int, station_e, station_n, bases_local) -> tuple:
    """Loop plan and where the tare happens.

    Returns ``(loops, tare_loop, tare_position)``: ``loops`` is a list of (loop name, day,
    [station indices; -1 = BASE-A, -2 = BASE-B]); the tare happens in loop ``tare_loop`` just
    before its reading number ``tare_position``. Every loop opens and closes at a base; the
    first loop ties the bases (A, B, ...) and the last one ties them again (..., base, other
    base, base). The tare falls in the middle of a loop of the second day; the crew notices
    it and rereads the last two stations read before it, which ties the loop's two segments
    (common field practice; Hinze, von Frese and Saad 2013).
    """
    ny = int(round(np.sqrt(n_stations)))
    order = []
    for r in range(ny):  # serpentine along the rows of the station grid
        row = list(range(r * ny, (r + 1) * ny))
        order.extend(row if r % 2 == 0 else row[::-1])
    chunks, i = [], 0
    while i < len(order):
        size = int(rng.integers(11, 15))
        chunks.append(order[i : i + size])
        i += size
    if len(chunks) > 1 and len(chunks[-1]) < 8:  # no short last loop: its drift would be poor
        chunks[-2] = chunks[-2] + chunks.pop()
    loops, day, in_day = [], 0, 0
    previous = None
    for c, chunk in enumerate(chunks):
        me = np.mean(station_e[chunk]), np.mean(station_n[chunk])
        da = np.hypot(me[0] - bases_local[0][0], me[1] - bases_local[0][1])
        db = np.hypot(me[0] - bases_local[1][0], me[1] - bases_local[1][1])
        base = -1 if da <= db else -2
        body = list(chunk)
        if previous is not None and rng.random() < 0.4:
            body = [previous[0]] + body  # repeat occupation of a station of the previous loop
        if in_day == 4:
            day += 1
            in_day = 0
        stations = [base] + body + [base]
        if c == 0:  # tie the bases at the start: A, B (, A) then the loop
            stations = [-1, -2] + ([-1] if base == -1 else []) + body + [base]
        if c == len(chunks) - 1:  # and at the end: ..., base, other base, base
            stations = stations + [-3 - base, base]
        loops.append((f"D{day + 1}L{in_day + 1}", day, stations))
        in_day += 1
        previous = chunk
    # The tare: in the middle of the middle loop of the second day (the first when one day).
    second = [k for k, lp in enumerate(loops) if lp[1] == min(1, day)]
    tare_loop = second[len(second) // 2]
    name, d, stations = loops[tare_loop]
    p = max(3, len(stations) // 2)
    loops[tare_loop] = (name, d, stations[:p] + stations[p - 2 : p] + stations[p:])
    return loops, tare_loop, p


def make_gravity(directory: Path, seed: int = 0) -> Path:
    """Write the ground gravity demo survey folder (see the module docstring).

    Parameters
    ----------
    directory : Path
        Survey folder (survey.toml, raw/, truth/, README.md).
    seed : int
        Seed of ``numpy.random.default_rng``.

    Returns
    -------
    Path
    """
    import boule

    from ..fields.gravity.tides import longman_gravity

    directory, raw, truth = common.survey_folders(directory)
    fwd, inv = common.transformers()
    e0, n0 = common.centre_projected()
    geo = rng_for(seed, "grav-geometry")

    # Terrain and DEM (cell-centred, ascending coordinates).
    far_h = 210.0
    terrain = common.make_terrain(
        rng_for(seed, "grav-terrain"), 10_000.0, base=far_h, relief=120.0, n_hills=8, n_valleys=3
    )
    terrain["slope_east"] = terrain["slope_north"] = 0.0  # keep the rim at far_h
    half_dem = SIDE / 2 + DEM_MARGIN
    dem_local = np.arange(-half_dem + DEM_CELL / 2, half_dem, DEM_CELL)
    DE, DN = np.meshgrid(dem_local, dem_local)
    dem_h = np.round(common.terrain_height(DE, DN, terrain), 2)

    # Stations on a jittered grid, snapped to the DEM cell tops; two bases.
    ny = int(SIDE / STATION_SPACING)
    grid = -SIDE / 2 + STATION_SPACING * (np.arange(ny) + 0.5)
    SE, SN = np.meshgrid(grid, grid)
    se = SE.ravel() + geo.uniform(-200, 200, SE.size)
    sn = SN.ravel() + geo.uniform(-200, 200, SN.size)
    bases_local = [(-0.42 * SIDE, -0.05 * SIDE), (0.38 * SIDE, 0.3 * SIDE)]
    all_e = np.r_[se, [b[0] for b in bases_local]]
    all_n = np.r_[sn, [b[1] for b in bases_local]]
    lon, lat = inv.transform(e0 + all_e, n0 + all_n)
    lon, lat = np.round(lon, 6), np.round(lat, 6)
    pe, pn = fwd.transform(lon, lat)
    all_e, all_n = pe - e0, pn - n0
    col = np.floor((all_e + half_dem) / DEM_CELL).astype(int)
    row = np.floor((all_n + half_dem) / DEM_CELL).astype(int)
    h_true = dem_h[row, col]
    names = np.r_[
        np.char.add("G", np.char.zfill(np.arange(1, se.size + 1).astype(str), 3)), ["BASE-A", "BASE-B"]
    ]
    n_st = se.size

    # Gravity at every station mark.
    ell = boule.WGS84
    normal = ell.normal_gravity((lon, lat, h_true))
    atm = atmospheric_correction(h_true)
    topo = topography_gravity(all_e, all_n, h_true, dem_local, dem_local, dem_h, far_h)
    model = body_model(rng_for(seed, "grav-bodies"), far_h)
    bodies = bodies_gravity(model, all_e, all_n, h_true)
    regional = regional_gravity(model, all_e, all_n)
    g_true = normal - atm + topo + bodies + regional

    # Occupations: loops in time order.
    loops, tare_loop, tare_position = _loops(geo, n_st, se, sn, bases_local)
    occ_station, occ_loop, occ_time, occ_day = [], [], [], []
    cursor = {}
    k_tare = 0
    for li, (name, day, stations) in enumerate(loops):  # loop over loops and their stations
        t = cursor.get(day, 0.0)
        for k, s in enumerate(stations):
            if li == tare_loop and k == tare_position:
                k_tare = len(occ_station)
            idx = n_st if s == -1 else (n_st + 1 if s == -2 else s)
            occ_station.append(idx)
            occ_loop.append(name)
            occ_day.append(day)
            occ_time.append(day * 86400.0 + t)
            t += float(geo.uniform(360.0, 720.0))
        cursor[day] = t + float(geo.uniform(600.0, 1500.0))
    occ_station = np.asarray(occ_station)
    occ_day = np.asarray(occ_day)
    occ_sec = np.round(np.asarray(occ_time))
    times = FIRST_DAY + (occ_sec * 1e9).astype("int64").astype("timedelta64[ns]")
    n_occ = occ_station.size

    meter = rng_for(seed, "grav-meter")
    ih = np.round(meter.uniform(0.3, 1.2, n_occ), 3)
    tide = longman_gravity(lon[occ_station], lat[occ_station], h_true[occ_station], times, GRAVIMETRIC_FACTOR)
    n_days = int(occ_day.max()) + 1
    rates = meter.uniform(0.010, 0.030, n_days)  # mGal/h (a well-behaved meter, inside spec)
    day_offsets = meter.normal(0.0, 0.3, n_days)
    day_start = np.array([occ_sec[occ_day == d].min() for d in range(n_days)])
    drift = day_offsets[occ_day] + rates[occ_day] * (occ_sec - day_start[occ_day]) / 3600.0
    # Tare: +0.08 mGal between two readings in the middle of a loop of the second day.
    tare_time_s = 0.5 * (occ_sec[k_tare - 1] + occ_sec[k_tare])
    tare = np.where(occ_sec > tare_time_s, 0.08, 0.0)
    noise = meter.normal(0.0, NOISE, n_occ)
    offset = float(np.floor(np.min(g_true) - 1500.0))
    reading_mgal = g_true[occ_station] - FREE_AIR_GRADIENT * ih + tide - offset + drift + tare + noise
    cal = calibration_table(rng_for(seed, "grav-calibration"))
    counter = np.round(mgal_to_counter(reading_mgal, cal), 3)
    noise = noise + (counter_to_mgal(counter, cal) - counter_to_mgal(mgal_to_counter(reading_mgal, cal), cal))

    # Recorded heights: a few cm of error, a few stations up to 0.1 m.
    herr = np.round(meter.normal(0.0, 0.03, n_st + 2), 3)
    bad = meter.choice(n_st, size=8, replace=False)
    herr[bad] = np.round(meter.choice([-1, 1], 8) * meter.uniform(0.07, 0.1, 8), 3)
    herr[n_st:] = 0.0  # bases are surveyed benchmarks
    h_rec = h_true + herr

    survey = pd.DataFrame(
        {
            "station": names[occ_station],
            "loop": np.asarray(occ_loop),
            "time_utc": common.iso_times(times, "s"),
            "longitude": lon[occ_station],
            "latitude": lat[occ_station],
            "height_m": np.round(h_rec[occ_station], 3),
            "instrument_height_m": ih,
            "reading_cu": counter,
        }
    )
    common.write_table(raw / SURVEY_FILE, survey)
    common.write_table(raw / CAL_FILE, cal)
    dem = make_grid(
        e0 + dem_local,
        n0 + dem_local,
        dem_h,
        name="elevation",
        units="m",
        long_name="terrain height above the WGS84 ellipsoid (invented data)",
        history="potfield.demo.gravity synthetic DEM",
    )
    dem.attrs["comment"] = common.DISCLAIMER
    write_netcdf(raw / DEM_FILE, dem, common.OUTPUT_CRS)

    st = occ_station
    occ_truth = pd.DataFrame(
        {
            "source_file": SURVEY_FILE,
            "source_row": np.arange(n_occ, dtype=np.int64) + 2,
            "station": names[st],
            "loop": np.asarray(occ_loop),
            "g_true": g_true[st],
            "instrument_height_effect": -FREE_AIR_GRADIENT * ih,
            "tide": tide,
            "meter_offset": -offset,
            "drift": drift,
            "tare": tare,
            "noise": noise,
            "reading_mgal": counter_to_mgal(counter, cal),
        }
    )
    common.write_table(
        truth / "readings_truth.csv",
        occ_truth,
        {
            c: 5
            for c in ("g_true", "instrument_height_effect", "tide", "drift", "tare", "noise", "reading_mgal")
        },
    )
    st_truth = pd.DataFrame(
        {
            "station": names,
            "longitude": lon,
            "latitude": lat,
            "easting": e0 + all_e,
            "northing": n0 + all_n,
            "height_true": h_true,
            "height_recorded": np.round(h_rec, 3),
            "height_error": herr,
            "normal_gravity": normal,
            "atmospheric_correction": atm,
            "topography": topo,
            "bodies": bodies,
            "regional": regional,
            "g_true": g_true,
            "bouguer_anomaly_true": bodies + regional,
            "free_air_anomaly_true": g_true - normal + atm,
        }
    )
    common.write_table(
        truth / "stations_truth.csv",
        st_truth,
        {
            "easting": 2,
            "northing": 2,
            "normal_gravity": 5,
            "atmospheric_correction": 5,
            "topography": 5,
            "bodies": 5,
            "regional": 5,
            "g_true": 5,
            "bouguer_anomaly_true": 5,
            "free_air_anomaly_true": 5,
        },
    )

    # True Bouguer anomaly grid on the ground surface (100 m nodes over the survey).
    gl = np.arange(-SIDE / 2, SIDE / 2 + 1, 100.0)
    GE, GN = np.meshgrid(gl, gl)
    gh = dem_h[
        np.clip(np.floor((GN + half_dem) / DEM_CELL).astype(int), 0, dem_local.size - 1),
        np.clip(np.floor((GE + half_dem) / DEM_CELL).astype(int), 0, dem_local.size - 1),
    ]
    gba = bodies_gravity(model, GE, GN, gh) + regional_gravity(model, GE, GN)
    ba = make_grid(
        e0 + gl,
        n0 + gl,
        np.round(gba, 5),
        name="bouguer_anomaly",
        units="mGal",
        long_name="true complete Bouguer anomaly on the ground (invented data)",
        history="potfield.demo.gravity true Bouguer anomaly",
    )
    ba.attrs["comment"] = common.DISCLAIMER
    write_netcdf(truth / "bouguer_anomaly.nc", ba, common.OUTPUT_CRS)

    base_g = {names[n_st]: round(float(g_true[n_st]), 3), names[n_st + 1]: round(float(g_true[n_st + 1]), 3)}
    tare_time = FIRST_DAY + np.timedelta64(int(tare_time_s * 1e9), "ns")
    tare_iso = str(tare_time.astype("datetime64[s]")) + "Z"
    params = {
        "disclaimer": common.DISCLAIMER,
        "seed": int(seed),
        "area": {
            "name": common.AREA_NAME,
            "crs": common.OUTPUT_CRS,
            "centre_easting": e0,
            "centre_northing": n0,
            "side_m": SIDE,
        },
        "stations": int(n_st),
        "occupations": int(n_occ),
        "loops": [l[0] for l in loops],
        "days": n_days,
        "bases": base_g,
        "meter": {
            "offset_mGal": offset,
            "drift_rates_mGal_per_h": np.round(rates, 5).tolist(),
            "day_offsets_mGal": np.round(day_offsets, 5).tolist(),
            "tare_mGal": 0.08,
            "tare_time": tare_iso,
            "noise_sigma_mGal": NOISE,
            "free_air_gradient_mGal_per_m": FREE_AIR_GRADIENT,
            "gravimetric_factor": GRAVIMETRIC_FACTOR,
        },
        "terrain": terrain,
        "plateau_height_m": far_h,
        "dem_cell_m": DEM_CELL,
        "dem_half_width_m": half_dem,
        "density_kg_m3": DENSITY,
        "bodies": model["bodies"],
        "regional": model["regional"],
        "truth_columns": {
            "readings_truth.csv": "reading_mgal = g_true + instrument_height_effect + tide + "
            "meter_offset + drift + tare + noise (mGal; counter through "
            "raw/calibration.csv)",
            "stations_truth.csv": "g_true = normal_gravity - atmospheric_correction + topography "
            "+ bodies + regional; bouguer_anomaly_true = bodies + regional",
        },
    }
    common.write_params(truth / "parameters.json", params)
    write_text(directory / "survey.toml", _survey_toml(base_g, tare_iso))
    common.write_readme(directory / "README.md", _readme(n_st, n_occ, n_days))
    return directory


def _survey_toml(base_g: dict, tare_iso: str) -> str:
    bases = "\n".join(f'[[drift.bases]]\nstation = "{k}"\ngravity = {v}\n' for k, v in base_g.items())
    return f"""# Demo ground gravity survey. {common.DISCLAIMER}
# Made by potfield.demo.make_demo("gravity"); the true components are in truth/ (never read by
# the pipeline).

{common.survey_tables("ground gravity", "gravity", SURVEY_FILE)}

[input.columns]
station = "station"
loop = "loop"
time = "time_utc"
longitude = "longitude"
latitude = "latitude"
height = "height_m"
instrument_height = "instrument_height_m"
reading = "reading_cu"

[input.units]
reading = "cu"
height = "m"
instrument_height = "m"

[input.time]
format = "iso"

[drift]
calibration_file = "raw/{CAL_FILE}"
tide = true
gravimetric_factor = {GRAVIMETRIC_FACTOR}
method = "network"
free_air_gradient = {FREE_AIR_GRADIENT}
# The field notes record one tare (a step in the meter reading) on the second day.
tares = ["{tare_iso}"]

{bases}
[reference]
ellipsoid = "WGS84"
density = {DENSITY}
bouguer = "cap"
atmospheric = true
dem_file = "raw/{DEM_FILE}"
dem_crs = "{common.OUTPUT_CRS}"
# The demo DEM covers the survey plus 21 km: a 20 km terrain radius (not the full 166.7 km).
terrain_radius_m = 20000.0
terrain_inner_radius_m = 2000.0

[level]
enabled = false

[grid]
spacing_m = 250.0
"""


def _readme(n_st: int, n_occ: int, n_days: int) -> str:
    return f"""# Demo: ground gravity survey over {common.AREA_NAME} (invented data)

{common.DISCLAIMER}

Made by `potfield demo gravity` (`potfield.demo.make_demo("gravity", ..., seed=0)`); the same
seed gives the same files.

## What is in it

- `raw/{SURVEY_FILE}`: {n_occ} readings at {n_st} stations and two bases (BASE-A, BASE-B) in
  loops over {n_days} days. Columns: station, loop, time_utc (ISO 8601), longitude, latitude, height_m
  (m above the ellipsoid, with a few cm of error), instrument_height_m, reading_cu (counter
  units).
- `raw/{CAL_FILE}`: the meter's interval table (counter, mgal, factor).
- `raw/{DEM_FILE}`: a 250 m DEM (NetCDF-CF, UTM 55S, heights above the ellipsoid) covering the
  survey plus 21 km.
- `truth/readings_truth.csv`: per reading the true gravity at the mark, the instrument-height
  effect, the tide the meter saw, the meter offset, drift, tare and noise.
- `truth/stations_truth.csv`: per station normal gravity, atmospheric correction, topography,
  bodies, regional trend, true heights and height errors, the true free-air and complete
  Bouguer anomalies.
- `truth/bouguer_anomaly.nc`, `truth/parameters.json` (drift rates, tare time, bodies, terrain).

## The geology (invented)

A dense intrusion (+250 kg/m^3, a positive anomaly of a few mGal) in the west, a low-density
sedimentary basin (-300 kg/m^3, a negative anomaly) in the north-east, and a regional gradient
rising to the east.

## What to look at in the results

- The network adjustment should find drift rates of 0.01-0.03 mGal/h and the 0.08 mGal tare;
  station gravity should match truth `g_true` to about 0.01-0.02 mGal.
- The complete Bouguer anomaly should match `bouguer_anomaly_true` to about 0.01 mGal plus two
  known effects: the recorded height errors (about 0.2 mGal per metre), and the topography
  beyond the 20 km terrain radius. The demo world has a plateau at 210 m out there (on the
  curved Earth), while a correction that takes the terrain beyond its DEM radius at each
  station's own height adds a layer of (station height - 210 m) that, lying below the
  station's horizon, pulls down: expect the processed anomaly to be lower than truth by about
  0.0015 mGal per metre of station height above 210 m (0 to -0.3 mGal here), a smooth
  height-correlated difference, the classic effect of a DEM that is too small.
"""
