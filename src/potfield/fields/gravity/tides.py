"""Earth tide: vertical tidal acceleration of the Moon and the Sun by Longman's formulas.

Longman (1959) gives the vertical components of the tidal accelerations of the Moon (to the
parallax term of order r/d) and the Sun on a rigid Earth, from the zenith angles of both bodies
computed with the mean orbital elements of Schureman (1958) / Bartels (1957). The elastic Earth
response is a constant gravimetric factor delta = 1 + h2 - 3/2 k2 (about 1.16).

Sign convention
---------------
Longman's accelerations are positive UPWARD (toward a body at the zenith): with the Moon
overhead the gravimeter reads LESS. :func:`longman_gravity` returns what the gravimeter sees,
the tidal change of measured gravity, which is minus Longman's value (negative with the Moon
overhead). The tide CORRECTION, which is added to readings, is its negative:

    g_corrected = g_observed - longman_gravity(...) = g_observed + longman_correction(...)

References
----------
* Longman, I. M. (1959). Formulas for computing the tidal accelerations due to the moon and the
  sun. Journal of Geophysical Research, 64(12), 2351-2355.
* Schureman, P. (1958). Manual of harmonic analysis and prediction of tides. U.S. Coast and
  Geodetic Survey Special Publication 98 (revised edition).
* Bartels, J. (1957). Gezeitenkraefte. Handbuch der Physik, 48, 734-774.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from ..errors import OutOfModelRange

#: Constants of Longman (1959), cgs units. The gravitational constant is CODATA 2018.
_MU = 6.6743e-8  # G, cm^3 g^-1 s^-2
_MOON_MASS = 7.3537e25  # g
_SUN_MASS = 1.993e33  # g
_MOON_ECC = 0.05490  # eccentricity of the Moon's orbit
_MEAN_MOTION_RATIO = 0.074804  # mean motion of the Sun / mean motion of the Moon
_MOON_DIST = 3.84402e10  # mean Earth-Moon distance, cm
_SUN_DIST = 1.495e13  # mean Earth-Sun distance, cm
_EARTH_A = 6.378270e8  # equatorial radius used by Longman, cm
_MOON_INCL = 0.08979719  # inclination of the Moon's orbit to the ecliptic, rad (5.145 deg)
_OBLIQUITY = np.radians(23.452)  # inclination of the equator to the ecliptic, rad

#: Epoch of Longman's elements: Greenwich mean noon, 1899 December 31.
_EPOCH = np.datetime64("1899-12-31T12:00:00", "ns")

#: Years within which mean-element formulas stay good to well below 1 microGal (common practice).
VALID_YEARS = (1800, 2200)


def _as_times(time: ArrayLike) -> np.ndarray:
    t = np.asarray(time)
    if not np.issubdtype(t.dtype, np.datetime64):
        t = np.asarray(t, dtype="datetime64[ns]")
    return t.astype("datetime64[ns]")


def longman_components(
    longitude: ArrayLike, latitude: ArrayLike, height: ArrayLike, time: ArrayLike
) -> tuple[np.ndarray, np.ndarray]:
    """Longman's upward tidal accelerations of the Moon and of the Sun (rigid Earth, mGal).

    Parameters
    ----------
    longitude, latitude : array_like
        Degrees, longitude positive EAST (converted internally to Longman's west-positive).
    height : array_like
        Height of the point (m); Longman's r is the geocentric radius of the spheroid plus it.
    time : array_like of numpy.datetime64
        UTC, timezone-naive.

    Returns
    -------
    moon, sun : numpy.ndarray
        Upward vertical accelerations (mGal), positive toward a body at the zenith, without
        the gravimetric factor.

    References
    ----------
    Longman, I. M. (1959), J. Geophys. Res. 64(12), 2351-2355, eq. 1-34.
    """
    t = _as_times(time)
    lon, lat, h, t = np.broadcast_arrays(
        np.asarray(longitude, dtype=float),
        np.asarray(latitude, dtype=float),
        np.asarray(height, dtype=float),
        t,
    )
    years = t.astype("datetime64[Y]").astype(int) + 1970
    if np.any((years < VALID_YEARS[0]) | (years > VALID_YEARS[1])):
        raise OutOfModelRange(
            f"tide asked for a time outside {VALID_YEARS[0]}-{VALID_YEARS[1]}",
            hint="check the dates of the readings",
        )
    shape = lon.shape
    lon, lat, h, t = (a.ravel() for a in (lon, lat, h, t))
    moon, sun = np.empty(lon.size), np.empty(lon.size)
    for start in range(0, lon.size, _CHUNK):  # chunks bound the temporaries' memory
        part = slice(start, start + _CHUNK)
        moon[part], sun[part] = _longman(lon[part], lat[part], h[part], t[part])
    return moon.reshape(shape), sun.reshape(shape)


#: Readings per chunk in :func:`longman_components`.
_CHUNK = 65_536


def _longman(lon, lat, h, t):
    """Longman (1959) eq. 1-34 on 1-D arrays (see :func:`longman_components`)."""
    days = (t - _EPOCH).astype("timedelta64[ns]").astype(np.int64) / 86_400e9
    T = days / 36525.0  # Julian centuries from the epoch
    T2, T3 = T * T, T * T * T
    day_ns = (t - t.astype("datetime64[D]")).astype("timedelta64[ns]").astype(np.int64)
    t0 = day_ns / 3600e9  # Greenwich civil time, hours of the day
    west = -lon  # Longman's longitude is positive west
    phi = np.radians(lat)
    sinlat, coslat = np.sin(phi), np.cos(phi)

    e, m = _MOON_ECC, _MEAN_MOTION_RATIO
    # Mean elements (rad), Longman (1959) eq. 10-13 after Bartels (1957) / Schureman (1958)
    s = 4.72000889397 + 8399.70927456 * T + 3.45575191895e-05 * T2 + 3.49065850399e-08 * T3
    p = 5.83515162814 + 71.0180412089 * T + 0.000180108282532 * T2 + 1.74532925199e-07 * T3
    hs = 4.88162798259 + 628.331950894 * T + 5.23598775598e-06 * T2
    N = 4.52360161181 - 33.757146295 * T + 3.6264063347e-05 * T2 + 3.39369576777e-08 * T3
    cosN, sinN = np.cos(N), np.sin(N)
    # Moon's orbit relative to the equator, eq. 15-20
    incl = np.arccos(np.cos(_OBLIQUITY) * np.cos(_MOON_INCL) - np.sin(_OBLIQUITY) * np.sin(_MOON_INCL) * cosN)
    nu = np.arcsin(np.sin(_MOON_INCL) * sinN / np.sin(incl))
    hour_angle = np.radians(15.0 * (t0 - 12.0) - west)
    chi = hour_angle + hs - nu
    cos_alpha = cosN * np.cos(nu) + sinN * np.sin(nu) * np.cos(_OBLIQUITY)
    sin_alpha = np.sin(_OBLIQUITY) * sinN / np.sin(incl)
    alpha = 2.0 * np.arctan(sin_alpha / (1.0 + cos_alpha))
    xi = N - alpha
    sigma = s - xi
    # Longitude of the Moon in its orbit from the ascending intersection with the equator, eq. 22
    ell = (
        sigma
        + 2.0 * e * np.sin(s - p)
        + 1.25 * e * e * np.sin(2.0 * (s - p))
        + 3.75 * m * e * np.sin(s - 2.0 * hs + p)
        + 1.375 * m * m * np.sin(2.0 * (s - hs))
    )
    # Sun, eq. 23-27
    p1 = 4.90822941839 + 0.0300025492114 * T + 7.85398163397e-06 * T2 + 5.3329504922e-08 * T3
    e1 = 0.01675104 - 0.00004180 * T - 0.000000126 * T2
    chi1 = hour_angle + hs
    ell1 = hs + 2.0 * e1 * np.sin(hs - p1)
    # Zenith angles, eq. 28-29
    cos_moon = sinlat * np.sin(incl) * np.sin(ell) + coslat * (
        np.cos(0.5 * incl) ** 2 * np.cos(ell - chi) + np.sin(0.5 * incl) ** 2 * np.cos(ell + chi)
    )
    cos_sun = sinlat * np.sin(_OBLIQUITY) * np.sin(ell1) + coslat * (
        np.cos(0.5 * _OBLIQUITY) ** 2 * np.cos(ell1 - chi1)
        + np.sin(0.5 * _OBLIQUITY) ** 2 * np.cos(ell1 + chi1)
    )
    # Distances, eq. 30-34 (cm)
    radius = np.sqrt(1.0 / (1.0 + 0.006738 * sinlat**2)) * _EARTH_A + h * 100.0
    ap = 1.0 / (_MOON_DIST * (1.0 - e * e))
    ap1 = 1.0 / (_SUN_DIST * (1.0 - e1 * e1))
    d = 1.0 / (
        1.0 / _MOON_DIST
        + ap * e * np.cos(s - p)
        + ap * e * e * np.cos(2.0 * (s - p))
        + 1.875 * ap * m * e * np.cos(s - 2.0 * hs + p)
        + ap * m * m * np.cos(2.0 * (s - hs))
    )
    D = 1.0 / (1.0 / _SUN_DIST + ap1 * e1 * np.cos(hs - p1))
    # Vertical accelerations, eq. 1-2 (gal -> mGal)
    gm = _MU * _MOON_MASS * radius / d**3 * (
        3.0 * cos_moon**2 - 1.0
    ) + 1.5 * _MU * _MOON_MASS * radius**2 / d**4 * (5.0 * cos_moon**3 - 3.0 * cos_moon)
    gs = _MU * _SUN_MASS * radius / D**3 * (3.0 * cos_sun**2 - 1.0)
    return gm * 1e3, gs * 1e3


def longman_gravity(
    longitude: ArrayLike,
    latitude: ArrayLike,
    height: ArrayLike,
    time: ArrayLike,
    gravimetric_factor: float = 1.16,
) -> np.ndarray:
    """Tidal change of measured gravity (mGal): what a gravimeter sees of the Earth tide.

    Equal to minus Longman's upward tidal acceleration of Moon and Sun times the gravimetric
    factor. SUBTRACT it from readings (or add :func:`longman_correction`) to remove the tide.

    Parameters
    ----------
    longitude, latitude : array_like
        Degrees (longitude positive east).
    height : array_like
        m above the ellipsoid (sea level is accurate enough: 1 km changes the tide by 0.02 %).
    time : array_like of numpy.datetime64
        UTC.
    gravimetric_factor : float
        1 + h2 - 3/2 k2 (1.16 common practice; 1.1575 with h2 = 0.612, k2 = 0.303).

    Returns
    -------
    numpy.ndarray
        mGal; negative when the Moon or the Sun is near the zenith or nadir.

    References
    ----------
    Longman, I. M. (1959), J. Geophys. Res. 64(12), 2351-2355.
    """
    gm, gs = longman_components(longitude, latitude, height, time)
    return -float(gravimetric_factor) * (gm + gs)


def longman_correction(
    longitude: ArrayLike,
    latitude: ArrayLike,
    height: ArrayLike,
    time: ArrayLike,
    gravimetric_factor: float = 1.16,
) -> np.ndarray:
    """Tide correction (mGal) to ADD to gravity readings: ``-longman_gravity(...)``.

    See :func:`longman_gravity` (Longman 1959, J. Geophys. Res. 64(12), 2351-2355).
    """
    return -longman_gravity(longitude, latitude, height, time, gravimetric_factor)
