"""International Geomagnetic Reference Field (IGRF-14) synthesis on arrays.

The main field of the Earth's core is the gradient of a scalar potential expanded in spherical
harmonics of degree 1 to 13 (10 before 1995) with Gauss coefficients published every five years
by IAGA (Alken et al. 2021, Earth Planets Space 73:49, for the method; IAGA Working Group V-MOD
2024, IGRF-14, doi:10.5281/zenodo.14012302, for the coefficients)::

    V(r, theta, lambda, t) = a sum_n (a/r)^(n+1) sum_m [g_n^m(t) cos m lambda
                                                        + h_n^m(t) sin m lambda] P_n^m(cos theta)

with a = 6371.2 km and Schmidt semi-normalised associated Legendre functions P_n^m (no
Condon-Shortley phase). Coefficients are linear in time between the 5-year epochs 1900.0-2025.0,
and follow the published secular variation from 2025.0 to 2030.0. Dates outside [1900, 2030]
are refused.

Positions are geodetic (WGS84 longitude, latitude, height above the ellipsoid in metres); the
field is computed in geocentric spherical coordinates and rotated back to the local geodetic
north-east-down frame (Langel 1987, "The main field", in Jacobs (ed.), Geomagnetism vol. 1,
Academic Press, eqs. 51-53; Hulot et al. 2015, Treatise on Geophysics 5.02, eq. 4).

The synthesis kernel is compiled with numba and runs in parallel over points; every point
carries its own date, so surveys spanning many days need no loop over dates.
"""

from __future__ import annotations

from functools import lru_cache
from importlib import resources
from typing import NamedTuple

import numba
import numpy as np
from numpy.typing import ArrayLike

from ..errors import BadGeometry, BadParameter, OutOfModelRange

__all__ = [
    "IGRFField",
    "GeocentricField",
    "igrf",
    "igrf_geocentric",
    "coefficients",
    "decimal_year",
    "geodetic_to_geocentric",
    "REFERENCE_RADIUS_M",
    "FIRST_YEAR",
    "LAST_YEAR",
    "MODEL_NAME",
]

#: Name of the model, for provenance records.
MODEL_NAME = "IGRF-14"
#: Geomagnetic reference radius a (m) of the IGRF (IAGA Working Group V-MOD 2024).
REFERENCE_RADIUS_M = 6_371_200.0
#: WGS84 semi-major axis (m) and flattening (NIMA TR8350.2, 2000).
WGS84_A = 6_378_137.0
WGS84_F = 1.0 / 298.257223563
WGS84_E2 = WGS84_F * (2.0 - WGS84_F)
#: First and last decimal year the model is defined for.
FIRST_YEAR = 1900.0
LAST_YEAR = 2030.0
#: Spacing of the main-field epochs (years).
EPOCH_STEP = 5.0
#: Highest degree of the model.
NMAX = 13


class IGRFField(NamedTuple):
    """IGRF components in the local geodetic frame (all numpy arrays of the broadcast shape).

    Attributes
    ----------
    north, east, down : ndarray
        X, Y, Z components (nT), relative to the WGS84 ellipsoid normal.
    horizontal : ndarray
        H = sqrt(X^2 + Y^2) (nT).
    total : ndarray
        Total intensity F = sqrt(X^2 + Y^2 + Z^2) (nT).
    inclination : ndarray
        I = atan2(Z, H) (degrees, positive down).
    declination : ndarray
        D = atan2(Y, X) (degrees, positive east of geographic north).
    """

    north: np.ndarray
    east: np.ndarray
    down: np.ndarray
    horizontal: np.ndarray
    total: np.ndarray
    inclination: np.ndarray
    declination: np.ndarray


class GeocentricField(NamedTuple):
    """IGRF components in geocentric spherical coordinates (nT).

    Attributes
    ----------
    radial : ndarray
        B_r, positive outward (= -Z of the spherical frame).
    theta : ndarray
        B_theta, positive southward (= -X of the spherical frame).
    phi : ndarray
        B_phi, positive eastward (= Y).
    """

    radial: np.ndarray
    theta: np.ndarray
    phi: np.ndarray


# --------------------------------------------------------------------------------------------
# Coefficient table
# --------------------------------------------------------------------------------------------


@lru_cache(maxsize=1)
def _table() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read data/igrf14.txt once: epochs (27,), g and h of shape (27, 14, 14) indexed [epoch, n, m].

    The last epoch, 2030.0, is built from the 2025.0 model and its secular variation, so that
    the time dependence is piecewise linear over all 26 intervals.
    """
    text = resources.files("potfield").joinpath("data/igrf14.txt").read_text(encoding="utf-8")
    lines = [line.split() for line in text.splitlines() if line.strip() and not line.startswith("#")]
    header, rows = lines[0], lines[1:]
    if header[:3] != ["n", "m", "kind"] or header[-1] != "sv":
        raise RuntimeError("potfield/data/igrf14.txt: unexpected header; reinstall potfield")
    epochs = np.array([float(v) for v in header[3:-1]] + [LAST_YEAR])
    g = np.zeros((epochs.size, NMAX + 1, NMAX + 1))
    h = np.zeros_like(g)
    for row in rows:
        n, m, kind = int(row[0]), int(row[1]), row[2]
        values = np.array([float(v) for v in row[3:]])
        target = g if kind == "g" else h
        target[:-1, n, m] = values[:-1]
        target[-1, n, m] = values[-2] + (LAST_YEAR - epochs[-2]) * values[-1]
    return epochs, g, h


@lru_cache(maxsize=1)
def _kernel_tables():
    """Per-interval start values and increments, interval degrees and recursion constants."""
    epochs, g, h = _table()
    g0, h0 = g[:-1].copy(), h[:-1].copy()
    dg, dh = np.diff(g, axis=0), np.diff(h, axis=0)
    # Highest degree with a non-zero coefficient at either end of each interval.
    nonzero = (np.abs(g) + np.abs(h)).reshape(epochs.size, NMAX + 1, -1).max(axis=2) > 0
    top = np.array([np.max(np.nonzero(row)[0]) for row in nonzero])
    nmax_interval = np.maximum(top[:-1], top[1:]).astype(np.int64)
    # Schmidt semi-normalised recursion (Langel 1987; Winch et al. 2005,
    # Geophys. J. Int. 160:487): for n > m
    #   P_n^m = [(2n-1) cos(theta) P_{n-1}^m - sqrt((n-1)^2 - m^2) P_{n-2}^m] / sqrt(n^2 - m^2),
    # and on the diagonal P_n^n = sqrt((2n-1)/(2n)) sin(theta) P_{n-1}^{n-1} for n >= 2.
    n = np.arange(NMAX + 1)[:, None].astype(float)
    m = np.arange(NMAX + 1)[None, :].astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        denom = np.sqrt(n**2 - m**2)
        k1 = np.where(n > m, (2 * n - 1) / denom, 0.0)
        k2 = np.where(n > m, np.sqrt(np.clip((n - 1) ** 2 - m**2, 0, None)) / denom, 0.0)
    mm = np.arange(NMAX + 1, dtype=float)
    sect = np.ones(NMAX + 1)
    sect[2:] = np.sqrt((2 * mm[2:] - 1) / (2 * mm[2:]))
    return g0, dg, h0, dh, nmax_interval, k1, k2, sect


def _check_years(years: np.ndarray) -> None:
    finite = years[np.isfinite(years)]
    if finite.size and (finite.min() < FIRST_YEAR or finite.max() > LAST_YEAR):
        bad = finite[(finite < FIRST_YEAR) | (finite > LAST_YEAR)]
        raise OutOfModelRange(
            f"{MODEL_NAME} is defined for dates from {FIRST_YEAR:.1f} to {LAST_YEAR:.1f} only; "
            f"got {bad.size} date(s) outside it (from {bad.min():.4f} to {bad.max():.4f})",
            hint="use dates within 1900-01-01 .. 2030-01-01",
        )


def coefficients(decimal_year: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """IGRF-14 Gauss coefficients at the given date(s).

    Linear interpolation between the 5-year main-field models 1900.0-2025.0 and linear
    extrapolation with the published secular variation from 2025.0 to 2030.0 (IAGA Working
    Group V-MOD 2024, IGRF-14, doi:10.5281/zenodo.14012302).

    Parameters
    ----------
    decimal_year : float or array_like
        Date(s) as decimal years (see :func:`decimal_year`), or numpy datetime64.

    Returns
    -------
    g, h : ndarray
        Coefficients (nT) of shape ``decimal_year.shape + (14, 14)``, indexed ``[..., n, m]``
        (zero where ``m > n`` and for ``n = 0``; ``h[..., n, 0] = 0``).

    Raises
    ------
    potfield.fields.errors.OutOfModelRange
        If a date is outside [1900, 2030].
    """
    years = _as_years(decimal_year)
    _check_years(years)
    epochs, g, h = _table()
    t = (years - FIRST_YEAR) / EPOCH_STEP
    k = np.clip(np.floor(np.nan_to_num(t)), 0, epochs.size - 2).astype(int)
    f = (t - k)[..., None, None]
    return g[k] + f * (g[k + 1] - g[k]), h[k] + f * (h[k + 1] - h[k])


# --------------------------------------------------------------------------------------------
# Time and coordinates
# --------------------------------------------------------------------------------------------


def decimal_year(times: ArrayLike) -> np.ndarray:
    """Dates as decimal years: year + (time - 1 January) / (length of that year).

    This is the time argument of the IGRF (IAGA Working Group V-MOD 2024): 2020-07-02T00:00
    is 2020 + 183/366 = 2020.5. Leap years are 366 days long.

    Parameters
    ----------
    times : datetime64, array_like of datetime64, datetime, pandas timestamps or floats
        Timezone-naive times are taken as UTC; timezone-aware pandas times are converted to UTC.
        Floats and integers are returned as they are (already decimal years).

    Returns
    -------
    ndarray of float
        Same shape as ``times``; NaT gives NaN.
    """
    try:  # timezone-aware pandas objects: to UTC, then naive
        import pandas as pd

        if isinstance(times, (pd.Series, pd.Index)) and isinstance(times.dtype, pd.DatetimeTZDtype):
            if isinstance(times, pd.Series):
                times = times.dt.tz_convert("UTC").dt.tz_localize(None)
            else:
                times = times.tz_convert("UTC").tz_localize(None)
        elif isinstance(times, pd.Timestamp) and times.tzinfo is not None:
            times = times.tz_convert("UTC").tz_localize(None)
    except ImportError:  # pragma: no cover - pandas is a dependency
        pass
    arr = np.asarray(times)
    if arr.dtype.kind in "fiub":
        return arr.astype(float)
    if arr.dtype.kind != "M":
        try:
            arr = arr.astype("datetime64[ns]")
        except (ValueError, TypeError) as err:
            raise BadParameter(
                f"cannot read times as dates ({err})",
                hint="give numpy datetime64 values, ISO 8601 strings or decimal years",
            ) from None
    t = arr.astype("datetime64[ns]")
    nat = np.isnat(t)
    out = np.full(t.shape, np.nan)
    if nat.all():
        return out
    ns = t.view(np.int64)
    valid = ns[~nat]
    # Year starts covering the data, then one searchsorted (much faster than a calendar
    # conversion of every time when there are millions of readings).
    first = np.datetime64(int(valid.min()), "ns").astype("datetime64[Y]")
    last = np.datetime64(int(valid.max()), "ns").astype("datetime64[Y]")
    starts = np.arange(first, last + 2).astype("datetime64[ns]").view(np.int64)
    index = np.searchsorted(starts, valid, side="right") - 1
    year0 = first.astype(np.int64) + 1970.0
    out[~nat] = year0 + index + (valid - starts[index]) / (starts[index + 1] - starts[index])
    return out


def _as_years(time: ArrayLike) -> np.ndarray:
    arr = np.asarray(time)
    if arr.dtype.kind in "fiub":
        return arr.astype(float)
    return decimal_year(time)


def geodetic_to_geocentric(latitude: ArrayLike, height: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """Geocentric radius and latitude of geodetic positions on the WGS84 ellipsoid.

    ``N = a / sqrt(1 - e^2 sin^2 phi)``, ``x = (N + h) cos phi``, ``z = (N (1 - e^2) + h) sin phi``,
    ``r = hypot(x, z)``, ``phi_c = atan2(z, x)`` (Langel 1987, "The main field", in Jacobs (ed.),
    Geomagnetism vol. 1, Academic Press, eqs. 51-53).

    Parameters
    ----------
    latitude : array_like
        Geodetic latitude (degrees).
    height : array_like
        Height above the ellipsoid (m).

    Returns
    -------
    radius : ndarray
        Distance from the Earth's centre (m).
    geocentric_latitude : ndarray
        Geocentric latitude (degrees).
    """
    phi = np.radians(np.asarray(latitude, dtype=float))
    height = np.asarray(height, dtype=float)
    sphi = np.sin(phi)
    big_n = WGS84_A / np.sqrt(1.0 - WGS84_E2 * sphi**2)
    x = (big_n + height) * np.cos(phi)
    z = (big_n * (1.0 - WGS84_E2) + height) * sphi
    return np.hypot(x, z), np.degrees(np.arctan2(z, x))


# --------------------------------------------------------------------------------------------
# Kernel
# --------------------------------------------------------------------------------------------


@numba.njit(parallel=True, cache=True, fastmath={"contract", "arcp", "reassoc", "nsz"})
def _synthesis_kernel(
    lon, lat_or_colat, height_or_radius, year, geodetic, g0, dg, h0, dh, nmax_interval, k1, k2, sect, out
):  # pragma: no cover
    """Field at each point; ``out`` rows: X, Y, Z, H, F, I, D (nT, nT, nT, nT, nT, deg, deg).

    Per point: geodetic -> geocentric position, coefficients at the point's date from its
    epoch interval and fraction, Schmidt semi-normalised P_n^m and dP_n^m/dtheta by upward
    recursion in n for each m (Langel 1987), and P_n^m / sin(theta) by the same recursion
    (seeded with P_m^m / sin(theta) = c_m sin^(m-1) theta) so that B_phi has no 1/sin(theta)
    singularity at the poles.
    """
    n_points = lon.size
    n_intervals = nmax_interval.size
    for i in numba.prange(n_points):
        yr = year[i]
        c1 = lat_or_colat[i]
        c2 = height_or_radius[i]
        lo = lon[i]
        if not (np.isfinite(yr) and np.isfinite(c1) and np.isfinite(c2) and np.isfinite(lo)):
            for j in range(7):
                out[j, i] = np.nan
            continue
        if geodetic:
            phi = np.radians(c1)
            sphi = np.sin(phi)
            cphi = np.cos(phi)
            big_n = 6378137.0 / np.sqrt(1.0 - 0.0066943799901413165 * sphi * sphi)
            x = (big_n + c2) * cphi
            z = (big_n * (1.0 - 0.0066943799901413165) + c2) * sphi
            r = np.sqrt(x * x + z * z)
            st = x / r  # sin(colatitude) = cos(geocentric latitude)
            ct = z / r
            # psi = phi - phi_c (geodetic minus geocentric latitude)
            cpsi = cphi * st + sphi * ct
            spsi = sphi * st - cphi * ct
        else:
            theta = np.radians(c1)
            st = np.sin(theta)
            ct = np.cos(theta)
            r = c2
            cpsi = 1.0
            spsi = 0.0
        t = (yr - 1900.0) / 5.0
        k = int(np.floor(t))
        if k < 0:
            k = 0
        if k > n_intervals - 1:
            k = n_intervals - 1
        f = t - k
        nmax = nmax_interval[k]
        ar = 6371200.0 / r
        lam = np.radians(lo)
        cl = np.cos(lam)
        sl = np.sin(lam)
        cm = 1.0
        sm = 0.0
        pmm = 1.0
        dpmm = 0.0
        qmm = 0.0
        arm = ar * ar  # (a/r)^(m+2)
        br = 0.0
        bt = 0.0
        bp = 0.0
        for m in range(nmax + 1):
            if m == 1:
                pmm = st
                dpmm = ct
                qmm = 1.0
            elif m >= 2:
                s = sect[m]
                dpmm = s * (st * dpmm + ct * pmm)
                pmm = s * st * pmm
                qmm = s * st * qmm
            p1 = pmm
            d1 = dpmm
            q1 = qmm
            p2 = 0.0
            d2 = 0.0
            q2 = 0.0
            arn = arm
            for n in range(m, nmax + 1):
                if n > m:
                    a1 = k1[n, m]
                    a2 = k2[n, m]
                    p = a1 * ct * p1 - a2 * p2
                    d = a1 * (ct * d1 - st * p1) - a2 * d2
                    q = a1 * ct * q1 - a2 * q2
                    p2 = p1
                    d2 = d1
                    q2 = q1
                    p1 = p
                    d1 = d
                    q1 = q
                    arn *= ar
                if n >= 1:
                    gnm = g0[k, n, m] + f * dg[k, n, m]
                    hnm = h0[k, n, m] + f * dh[k, n, m]
                    gc = gnm * cm + hnm * sm
                    br += (n + 1) * arn * gc * p1
                    bt -= arn * gc * d1
                    if m > 0:
                        bp += arn * m * (gnm * sm - hnm * cm) * q1
            cm, sm = cm * cl - sm * sl, sm * cl + cm * sl
            arm *= ar
        xs = -bt
        zs = -br
        bx = xs * cpsi + zs * spsi
        bz = -xs * spsi + zs * cpsi
        hh = np.sqrt(bx * bx + bp * bp)
        out[0, i] = bx
        out[1, i] = bp
        out[2, i] = bz
        out[3, i] = hh
        out[4, i] = np.sqrt(hh * hh + bz * bz)
        out[5, i] = np.degrees(np.arctan2(bz, hh))
        out[6, i] = np.degrees(np.arctan2(bp, bx))


def _run_kernel(
    longitude: ArrayLike, coord1: ArrayLike, coord2: ArrayLike, time: ArrayLike, geodetic: bool
) -> list[np.ndarray]:
    years = _as_years(time)
    _check_years(years)
    arrays = np.broadcast_arrays(
        np.asarray(longitude, dtype=float),
        np.asarray(coord1, dtype=float),
        np.asarray(coord2, dtype=float),
        years,
    )
    shape = arrays[0].shape
    flat = [np.ascontiguousarray(a, dtype=np.float64).ravel() for a in arrays]
    out = np.empty((7, flat[0].size))
    if flat[0].size:
        _synthesis_kernel(flat[0], flat[1], flat[2], flat[3], geodetic, *_kernel_tables(), out)
    return [row.reshape(shape) for row in out]


def igrf(longitude: ArrayLike, latitude: ArrayLike, height: ArrayLike, time: ArrayLike) -> IGRFField:
    """IGRF-14 main field at geodetic positions and dates.

    Spherical-harmonic synthesis of the IGRF-14 potential to degree 13 (10 before 1995) with
    reference radius a = 6371.2 km, Schmidt semi-normalised associated Legendre functions and
    coefficients linear in time between 5-year epochs (secular variation after 2025.0)
    (IAGA Working Group V-MOD 2024, IGRF-14, doi:10.5281/zenodo.14012302; Alken et al. 2021,
    Earth Planets Space 73:49). Positions are converted from geodetic to geocentric and the
    vector is rotated back to the geodetic frame (Langel 1987, in Jacobs (ed.), Geomagnetism
    vol. 1, Academic Press, eqs. 51-53).

    Parameters
    ----------
    longitude, latitude : array_like
        Geodetic WGS84 coordinates (degrees). Latitude in [-90, 90].
    height : array_like
        Height above the WGS84 ellipsoid (m).
    time : array_like
        numpy datetime64 (UTC), or decimal years as floats. All four inputs broadcast against
        each other; NaN/NaT entries give NaN results.

    Returns
    -------
    IGRFField
        north, east, down, horizontal, total (nT), inclination, declination (degrees), each an
        array of the broadcast shape (0-d for scalar inputs).

    Raises
    ------
    potfield.fields.errors.OutOfModelRange
        A date outside [1900, 2030].
    potfield.fields.errors.BadGeometry
        A latitude outside [-90, 90], or times that cannot be read.

    Examples
    --------
    >>> field = igrf(5.32, 60.39, 0.0, np.datetime64("2021-03-28"))
    >>> round(float(field.total)), round(float(field.inclination), 2)
    (51263, 72.98)
    """
    lat = np.asarray(latitude, dtype=float)
    bad = np.abs(lat) > 90.0
    if np.any(bad):
        where = np.argwhere(np.atleast_1d(bad))[0]
        raise BadGeometry(
            f"latitude {np.atleast_1d(lat)[tuple(where)]:g} at index {tuple(int(w) for w in where)} "
            "is outside [-90, 90] degrees",
            hint="give latitudes in degrees (swapped with longitude, or projected coordinates?)",
        )
    return IGRFField(*_run_kernel(longitude, lat, height, time, True))


def igrf_geocentric(
    radius: ArrayLike, colatitude: ArrayLike, longitude: ArrayLike, time: ArrayLike
) -> GeocentricField:
    """IGRF-14 main field in geocentric spherical coordinates.

    The same synthesis as :func:`igrf` (IAGA Working Group V-MOD 2024; Langel 1987), without the
    geodetic conversion: ``B = -grad V`` at geocentric radius, colatitude and longitude.

    Parameters
    ----------
    radius : array_like
        Distance from the Earth's centre (m).
    colatitude : array_like
        Geocentric colatitude (degrees, 0 at the north pole, 180 at the south pole).
    longitude : array_like
        Longitude (degrees east).
    time : array_like
        numpy datetime64 or decimal years (broadcast with the positions).

    Returns
    -------
    GeocentricField
        radial (outward), theta (southward), phi (eastward) components (nT).

    Raises
    ------
    potfield.fields.errors.OutOfModelRange
        A date outside [1900, 2030].
    potfield.fields.errors.BadGeometry
        A colatitude outside [0, 180] or a radius that is not positive.
    """
    colat = np.asarray(colatitude, dtype=float)
    radius = np.asarray(radius, dtype=float)
    if np.any((colat < 0) | (colat > 180)):
        raise BadGeometry("colatitude outside [0, 180] degrees", hint="give geocentric colatitudes")
    if np.any(radius <= 0):
        raise BadGeometry(
            "radius must be positive (m from the Earth's centre)", hint="give geocentric radii in metres"
        )
    x, y, z, *_ = _run_kernel(longitude, colat, radius, time, False)
    return GeocentricField(radial=-z, theta=-x, phi=y)
