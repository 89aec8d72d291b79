"""Observatory-network demo with known truth: fictional stations, IAGA-2002 minute files.

All data are invented: the stations, their names and three-letter codes are fictional (the
IAGA-2002 comment records say so). The scenario, for three days of one-minute values:

* main field: IGRF-14 at each station (potfield.fields.magnetic.igrf; IAGA Working Group V-MOD 2024);
* external field from time-varying external Gauss coefficients of degree 1 and 2: a storm-like
  ring-current variation in q10 (sudden commencement, main phase, recovery), a daily variation
  fixed to the Sun in q11/s11, q21/s21 and q22/s22 (the Sun-fixed pattern rotates westward over
  the Earth once a day);
* its induced internal part: internal coefficients Q_n times the external ones, Q_1 = 0.27 and
  Q_2 = 0.18 (real transfer ratios for a conducting Earth, from memory; Olsen, Glassmeier and
  Jia 2010, Space Sci. Rev. 152:135, discuss the degree-1 ratio of about 0.25-0.3), so the
  internal g10, g11, h11 vary too;
* a small non-potential part per station (smooth, 1-2 nT), noise (0.1 nT) and a few gaps
  (written as 99999.00 by the IAGA-2002 writer).

The synthesis of internal and external fields (:func:`synth_field`) implements the standard
spherical-harmonic expansion of the potential with Schmidt semi-normalised associated Legendre
functions (Chapman and Bartels 1940, Geomagnetism, Oxford; Olsen, Glassmeier and Jia 2010):

    V = a sum_n sum_m { (a/r)^(n+1) [g cos m phi + h sin m phi]
                        + (r/a)^n [q cos m phi + s sin m phi] } P_n^m(cos theta),  B = -grad V.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from . import common
from .common import rng_for

#: Reference radius of the expansion (km), as IGRF (IAGA Working Group V-MOD 2024).
REFERENCE_RADIUS_KM = 6371.2
#: Induced internal / external ratio per degree (from memory; see the module docstring).
Q_RATIO = {1: 0.27, 2: 0.18}
FIRST_DAY = np.datetime64("2025-05-10T00:00:00", "ns")
DAYS = 3
#: Fictional stations: code, name, geodetic latitude, longitude (deg E), elevation (m).
STATIONS = [
    ("ZQV", "Zarquill Vale", 57.8, -101.5, 240.0),
    ("XJW", "Xanjor Wells", 41.2, 18.6, 410.0),
    ("QZK", "Quezzik Bay", 27.4, 139.3, 35.0),
    ("VXQ", "Vaxqua Heights", -6.3, -61.2, 120.0),
    ("JQZ", "Jaquez Downs", -29.6, 24.8, 1180.0),
    ("WZX", "Wozzex Ridge", -41.5, 147.9, 310.0),
    ("KQX", "Kixquo Plateau", 12.7, 79.1, 560.0),
]


def coefficient_index(nmax: int) -> list[tuple[int, int, str]]:
    """(n, m, "g"|"h") in the usual order g10, g11, h11, g20, g21, h21, g22, h22, ... (the
    ordering of IGRF tables and chaosmagpy)."""
    out = []
    for n in range(1, nmax + 1):
        out.append((n, 0, "g"))
        for m in range(1, n + 1):
            out.append((n, m, "g"))
            out.append((n, m, "h"))
    return out


def schmidt_legendre(nmax: int, theta_deg):
    """Schmidt semi-normalised associated Legendre functions P_n^m(cos theta) and their
    theta-derivatives, no Condon-Shortley phase (Chapman and Bartels 1940; Winch et al. 2005,
    Geophys. J. Int. 160:487).

    Returns
    -------
    P, dP : dict
        ``P[(n, m)]`` and ``dP[(n, m)]`` arrays of the shape of ``theta_deg``.
    """
    from math import factorial

    th = np.radians(np.asarray(theta_deg, dtype=float))
    x, s = np.cos(th), np.sin(th)
    P = {}
    for m in range(nmax + 1):  # recursion over degree and order (a handful of terms)
        dfact = 1.0
        for k in range(1, 2 * m, 2):
            dfact *= k
        P[(m, m)] = dfact * s**m
        if m + 1 <= nmax:
            P[(m + 1, m)] = (2 * m + 1) * x * P[(m, m)]
        for n in range(m + 2, nmax + 1):
            P[(n, m)] = ((2 * n - 1) * x * P[(n - 1, m)] - (n + m - 1) * P[(n - 2, m)]) / (n - m)
    dP = {}
    for (n, m), p in P.items():
        prev = P.get((n - 1, m), 0.0)
        # sin(theta) dP/dtheta = n cos(theta) P_n^m - (n + m) P_(n-1)^m  (unnormalised)
        dP[(n, m)] = (n * x * p - (n + m) * prev) / s
    out_p, out_dp = {}, {}
    for n, m in P:
        if n == 0:
            continue
        norm = 1.0 if m == 0 else np.sqrt(2.0 * factorial(n - m) / factorial(n + m))
        out_p[(n, m)] = norm * P[(n, m)]
        out_dp[(n, m)] = norm * dP[(n, m)]
    return out_p, out_dp


def synth_field(coeffs, radius_km, theta_deg, phi_deg, *, source: str = "internal"):
    """Field components of an internal or external spherical-harmonic potential.

    Parameters
    ----------
    coeffs : array, shape (..., nmax (nmax + 2))
        Gauss coefficients (nT) ordered as :func:`coefficient_index` (g10, g11, h11, g20, ...;
        for an external source q and s in the same slots).
    radius_km, theta_deg, phi_deg : array
        Geocentric radius (km), colatitude and longitude (degrees); broadcast with
        ``coeffs[..., 0]``.
    source : {"internal", "external"}

    Returns
    -------
    B_r, B_theta, B_phi : numpy.ndarray
        Radial (outward), colatitude (southward) and azimuthal (eastward) components (nT).

    Notes
    -----
    Internal: B_r = sum (n+1) (a/r)^(n+2) T P, B_theta = -sum (a/r)^(n+2) T dP/dtheta,
    B_phi = sum (a/r)^(n+2) m (g sin m phi - h cos m phi) P / sin theta, with
    T = g cos m phi + h sin m phi. External: (a/r)^(n+2) becomes (r/a)^(n-1) and the radial
    factor (n+1) becomes -n (Chapman and Bartels 1940; Olsen, Glassmeier and Jia 2010, Space
    Sci. Rev. 152:135, eqs. 1-3).
    """
    coeffs = np.asarray(coeffs, dtype=float)
    size = coeffs.shape[-1]
    nmax = int(round(np.sqrt(size + 1) - 1))
    if nmax * (nmax + 2) != size:
        raise ValueError(f"{size} coefficients is not nmax (nmax + 2) for any degree")
    rho = np.asarray(radius_km, dtype=float) / REFERENCE_RADIUS_KM
    theta = np.asarray(theta_deg, dtype=float)
    phi = np.radians(np.asarray(phi_deg, dtype=float))
    P, dP = schmidt_legendre(nmax, theta)
    sin_t = np.sin(np.radians(theta))
    br = bt = bp = 0.0
    for k, (n, m, kind) in enumerate(coefficient_index(nmax)):
        c = coeffs[..., k]
        if kind == "g":
            cos_part, sin_part = np.cos(m * phi), np.sin(m * phi)
        else:
            cos_part, sin_part = np.sin(m * phi), -np.cos(m * phi)
        # T = c * cos_part;  d T / d phi = m * c * (-sin_part)
        if source == "internal":
            radial_f, scale = (n + 1), rho ** (-(n + 2))
        elif source == "external":
            radial_f, scale = -n, rho ** (n - 1)
        else:
            raise ValueError("source must be 'internal' or 'external'")
        br = br + radial_f * scale * c * cos_part * P[(n, m)]
        bt = bt - scale * c * cos_part * dP[(n, m)]
        bp = bp + scale * m * c * sin_part * P[(n, m)] / sin_t
    return br, bt, bp


def spherical_to_geodetic(br, bt, bp, latitude, height):
    """Rotate geocentric (B_r, B_theta, B_phi) to geodetic north, east, down (Langel 1987,
    Geomagnetism vol. 1, eqs. 51-53; references.md: X = X_s cos psi + Z_s sin psi,
    Z = -X_s sin psi + Z_s cos psi, psi = geodetic - geocentric latitude)."""
    from ..fields.magnetic.igrf import geodetic_to_geocentric

    _, lat_c = geodetic_to_geocentric(latitude, height)
    psi = np.radians(np.asarray(latitude, dtype=float) - lat_c)
    xs, zs = -np.asarray(bt), -np.asarray(br)
    return xs * np.cos(psi) + zs * np.sin(psi), np.asarray(bp), -xs * np.sin(psi) + zs * np.cos(psi)


def external_coefficients(rng: np.random.Generator, minutes: np.ndarray) -> pd.DataFrame:
    """External Gauss coefficients (nT) per minute: q10 storm-like ring current, Sun-fixed
    daily variation in degree 1 and 2.

    Parameters
    ----------
    minutes : array
        Minutes since :data:`FIRST_DAY`.
    """
    t_h = minutes / 60.0
    # Ring current: quiet level, sudden commencement (q10 dips: compression), main phase rise,
    # exponential recovery (Dst-like; Chapman and Bartels 1940 describe the storm-time shape).
    onset = 24.0 + rng.uniform(4.0, 10.0)  # hours, on the second day
    quiet = rng.uniform(14.0, 22.0)
    peak = rng.uniform(70.0, 110.0)
    rise, recovery = rng.uniform(4.0, 8.0), rng.uniform(10.0, 16.0)
    dt = t_h - onset
    sc = -12.0 * np.exp(-0.5 * ((dt + 0.5) / 0.4) ** 2)
    main = np.where(
        dt < 0,
        0.0,
        np.where(
            dt < rise, peak * (dt / rise) ** 2 * (3 - 2 * dt / rise), peak * np.exp(-(dt - rise) / recovery)
        ),
    )
    q10 = quiet + sc + main
    # Daily variation: a pattern fixed to the Sun. The subsolar longitude is 180 - 15 UT (deg);
    # q cos(m phi) + s sin(m phi) = A cos(m (phi - phi_sun) - alpha).
    phi_sun = np.radians(180.0 - 15.0 * np.mod(t_h, 24.0))
    day = np.clip(np.floor(t_h / 24.0).astype(int), 0, DAYS - 1)
    f = rng.uniform(0.8, 1.2, DAYS)[day]
    a11, a21, a22 = rng.uniform(5.0, 8.0), rng.uniform(2.0, 4.0), rng.uniform(1.5, 3.0)
    al = rng.uniform(-0.5, 0.5, 3)
    frame = pd.DataFrame(
        {
            "q10": q10,
            "q11": f * a11 * np.cos(phi_sun + al[0]),
            "s11": f * a11 * np.sin(phi_sun + al[0]),
            "q20": np.full(t_h.shape, -1.5),
            "q21": f * a21 * np.cos(phi_sun + al[1]),
            "s21": f * a21 * np.sin(phi_sun + al[1]),
            "q22": f * a22 * np.cos(2 * phi_sun + al[2]),
            "s22": f * a22 * np.sin(2 * phi_sun + al[2]),
        }
    )
    frame.attrs["storm"] = {
        "onset_hours": float(onset),
        "quiet_nT": float(quiet),
        "peak_nT": float(peak),
        "rise_hours": float(rise),
        "recovery_hours": float(recovery),
    }
    return frame


def induced_coefficients(external: pd.DataFrame) -> pd.DataFrame:
    """Induced internal coefficients g = Q_n q, h = Q_n s (nT)."""
    out = {}
    for name in external.columns:
        n = int(name[1])
        out[("g" if name[0] == "q" else "h") + name[1:] + "_induced"] = Q_RATIO[n] * external[name]
    return pd.DataFrame(out)


def make_observatory(directory: Path, seed: int = 0) -> Path:
    """Write the observatory-network demo folder (see the module docstring).

    Parameters
    ----------
    directory : Path
    seed : int

    Returns
    -------
    Path
    """
    from ..fields.magnetic.igrf import coefficients, decimal_year, geodetic_to_geocentric, igrf
    from ..io.atomic import write_text
    from ..io.iaga2002 import write_iaga2002

    directory, raw, truth = common.survey_folders(directory)
    minutes = np.arange(DAYS * 1440, dtype=float)
    times = FIRST_DAY + (minutes * 60e9).astype("int64").astype("timedelta64[ns]")
    ext = external_coefficients(rng_for(seed, "obs-external"), minutes)
    ind = induced_coefficients(ext)
    ext_arr = ext[["q10", "q11", "s11", "q20", "q21", "s21", "q22", "s22"]].to_numpy()
    ind_arr = ind.to_numpy()

    g, h = coefficients(decimal_year(times))
    coef = pd.DataFrame({"time": common.iso_times(times, "s")})
    coef = pd.concat([coef, ext.reset_index(drop=True), ind.reset_index(drop=True)], axis=1)
    coef["g10_igrf"], coef["g11_igrf"], coef["h11_igrf"] = g[:, 1, 0], g[:, 1, 1], h[:, 1, 1]
    coef["g10_total"] = coef["g10_igrf"] + coef["g10_induced"]
    coef["g11_total"] = coef["g11_igrf"] + coef["g11_induced"]
    coef["h11_total"] = coef["h11_igrf"] + coef["h11_induced"]
    write_cols = {c: 4 for c in coef.columns if c != "time"}
    common.write_table(truth / "coefficients.csv", coef, write_cols)

    rng = rng_for(seed, "obs-stations")
    truth_frames, files = [], []
    for code, name, lat, lon, elev in STATIONS:  # loop over stations
        main = igrf(lon, lat, elev, times)
        r_m, lat_c = geodetic_to_geocentric(lat, elev)
        r_km, colat = float(r_m) / 1000.0, 90.0 - float(lat_c)
        e_r, e_t, e_p = synth_field(ext_arr, r_km, colat, lon, source="external")
        i_r, i_t, i_p = synth_field(ind_arr, r_km, colat, lon, source="internal")
        ex, ey, ez = spherical_to_geodetic(e_r, e_t, e_p, lat, elev)
        ix, iy, iz = spherical_to_geodetic(i_r, i_t, i_p, lat, elev)
        station_id = np.zeros(minutes.size, dtype=int)
        nx = common.fourier_wander(rng, station_id, minutes, 1, 1.2, (480.0, 210.0, 97.0))
        ny = common.fourier_wander(rng, station_id, minutes, 1, 0.8, (400.0, 170.0))
        nz = common.fourier_wander(rng, station_id, minutes, 1, 1.0, (520.0, 230.0))
        true_x, true_y, true_z = main.north + ex + ix + nx, main.east + ey + iy + ny, main.down + ez + iz + nz
        x = np.round(true_x + rng.normal(0, 0.1, minutes.size), 2)
        y = np.round(true_y + rng.normal(0, 0.1, minutes.size), 2)
        z = np.round(true_z + rng.normal(0, 0.1, minutes.size), 2)
        f = np.round(np.sqrt(true_x**2 + true_y**2 + true_z**2) + rng.normal(0, 0.05, minutes.size), 2)
        gap = np.zeros(minutes.size, dtype=bool)
        for _ in range(int(rng.integers(1, 3))):  # one or two gaps per station
            start = int(rng.integers(60, minutes.size - 200))
            gap[start : start + int(rng.integers(5, 90))] = True
        for arr in (x, y, z, f):
            arr[gap] = np.nan
        frame = pd.DataFrame({"time": times, "X": x, "Y": y, "Z": z, "F": f})
        header = {
            "source": "potfield demo (invented data)",
            "station_name": f"{name} (fictional)",
            "iaga_code": code,
            "latitude": lat,
            "longitude": lon,
            "elevation": elev,
            "reported": "XYZF",
            "sensor_orientation": "XYZF",
            "digital_sampling": "1 second",
            "interval_type": "1-minute (instantaneous)",
            "data_type": "variation",
        }
        comments = [
            f"Invented data: {code} is a fictional station made by potfield.demo.",
            "No real observatory is meant. IGRF-14 main field plus synthetic",
            "external and induced fields, a non-potential part and noise.",
        ]
        for d in range(DAYS):  # one file per station and day (the IAGA-2002 naming habit)
            sel = slice(d * 1440, (d + 1) * 1440)
            day = str(FIRST_DAY.astype("datetime64[D]") + np.timedelta64(d, "D")).replace("-", "")
            fname = f"{code.lower()}{day}vmin.min"
            write_iaga2002(
                raw / fname, frame.iloc[sel].reset_index(drop=True), header=header, comments=comments
            )
            files.append(f"raw/{fname}")
        truth_frames.append(
            pd.DataFrame(
                {
                    "station": code,
                    "time": common.iso_times(times, "s"),
                    "external_north": ex,
                    "external_east": ey,
                    "external_down": ez,
                    "induced_north": ix,
                    "induced_east": iy,
                    "induced_down": iz,
                    "nonpotential_north": nx,
                    "nonpotential_east": ny,
                    "nonpotential_down": nz,
                    "gap": gap.astype(int),
                }
            )
        )
    st_truth = pd.concat(truth_frames, ignore_index=True)
    common.write_table(
        truth / "stations_truth.csv",
        st_truth,
        {c: 2 for c in st_truth.columns if c not in ("station", "time", "gap")},
    )
    params = {
        "disclaimer": common.DISCLAIMER,
        "seed": int(seed),
        "stations": [
            {"code": c, "name": f"{n} (fictional)", "latitude": la, "longitude": lo, "elevation_m": el}
            for c, n, la, lo, el in STATIONS
        ],
        "first_day": str(FIRST_DAY.astype("datetime64[D]")),
        "days": DAYS,
        "reference_radius_km": REFERENCE_RADIUS_KM,
        "induced_ratio": {str(k): v for k, v in Q_RATIO.items()},
        "storm": ext.attrs["storm"],
        "noise_sigma_nT": {"vector": 0.1, "scalar": 0.05},
        "nonpotential_rms_nT": {"north": 1.2, "east": 0.8, "down": 1.0},
        "files": files,
        "truth_columns": {
            "coefficients.csv": "external q/s and induced g/h (nT) per minute; g10_total etc. "
            "= IGRF-14 + induced",
            "stations_truth.csv": "per station and minute: external, induced and non-potential "
            "parts (nT, geodetic north/east/down); the file values = "
            "main + their sum + noise, main = IGRF-14 at the station "
            "(potfield.fields.magnetic.igrf.igrf at the header's latitude, "
            "longitude and elevation as ellipsoidal height); gap = 1 where "
            "written as 99999",
        },
    }
    common.write_params(truth / "parameters.json", params)
    write_text(directory / "survey.toml", _survey_toml())
    common.write_readme(directory / "README.md", _readme())
    return directory


def _survey_toml() -> str:
    return f"""# Demo observatory network. {common.DISCLAIMER}
# Made by potfield.demo.make_demo("observatory"); the true coefficients and components are in
# truth/ (never read by the pipeline). Every station and code is fictional.

[survey]
name = "Fictional observatory network demo (invented data)"
kind = "observatory"
crs = "EPSG:4326"
# A world-wide network: a global projected CRS (WGS 84 / World Equidistant Cylindrical)
# rather than one UTM zone.
output_crs = "EPSG:4087"
height_reference = "ellipsoid"

[input]
files = ["raw/*.min"]

[reference]
# IGRF-14 at each station and minute.

[separate]
internal_degree = 1
external_degree = 1
"""


def _readme() -> str:
    codes = ", ".join(c for c, *_ in STATIONS)
    return f"""# Demo: a network of fictional geomagnetic observatories (invented data)

{common.DISCLAIMER} The stations ({codes}) and their names are fictional.

Made by `potfield demo observatory` (`potfield.demo.make_demo("observatory", ..., seed=0)`).

## What is in it

- `raw/*.min`: IAGA-2002 one-minute XYZF files, one per station and day, {DAYS} days from
  {str(FIRST_DAY.astype("datetime64[D]"))}; a few gaps written as 99999.00.
- `truth/coefficients.csv`: per minute the external Gauss coefficients (q10 storm-like ring
  current; q11/s11, q21/s21, q22/s22 daily variation fixed to the Sun; q20 constant) and the
  induced internal ones (0.27 x degree 1, 0.18 x degree 2), and g10/g11/h11 totals (IGRF-14 +
  induced).
- `truth/stations_truth.csv`: per station and minute the external, induced and non-potential
  parts (geodetic north, east, down, nT); the main field is IGRF-14 at the station
  (`potfield.fields.magnetic.igrf.igrf`, elevation taken as ellipsoidal height).
- `truth/parameters.json`: stations, storm parameters, ratios, noise.

## What to look at in the results

- After removing IGRF-14, the degree-1 separation should recover q10 (quiet about 15-20 nT,
  rising to about 70-110 nT in the storm on the second day), the daily rotation of q11/s11,
  and an induced/external ratio g10/q10 near 0.27.
- The degree-2 daily terms and the non-potential part (1-2 nT) are what a degree-1 fit cannot
  explain: they set the floor of the residuals.
"""
