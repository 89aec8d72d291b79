"""Normal gravity and the classic gravity reductions, as plain functions on numpy arrays.

Units: gravity in mGal, heights in metres above the ellipsoid (the height type recommended by
Hinze et al. 2005), latitudes in degrees (geodetic), densities in kg/m^3.

Sign conventions
----------------
* :func:`normal_gravity` is the magnitude of the normal gravity vector at the point (positive).
* :func:`free_air_correction` is the amount ADDED to observed gravity to bring it down to the
  ellipsoid (positive for points above it).
* :func:`atmospheric_correction` is ADDED to observed gravity (positive).
* :func:`bouguer_slab` and :func:`bouguer_cap` are the attractions of the masses between the
  ellipsoid and the station; they are SUBTRACTED from the free-air anomaly.

References
----------
* Li, X. and Goetze, H.-J. (2001). Ellipsoid, geoid, gravity, geodesy, and geophysics.
  Geophysics, 66(6), 1660-1668.
* Hinze, W. J., et al. (2005). New standards for reducing gravity data: The North American
  gravity database. Geophysics, 70(4), J25-J32.
* Hofmann-Wellenhof, B. and Moritz, H. (2006). Physical Geodesy, 2nd ed. Springer (ch. 2).
* LaFehr, T. R. (1991). An exact solution for the gravity curvature (Bullard B) correction.
  Geophysics, 56(8), 1179-1184.
* Moritz, H. (1980). Geodetic Reference System 1980. Bulletin Geodesique, 54, 395-405.
* NIMA (2000). Department of Defense World Geodetic System 1984, TR8350.2, 3rd ed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from ..errors import BadParameter

#: Newtonian constant of gravitation, m^3 kg^-1 s^-2 (CODATA 2018).
G = 6.6743e-11
#: mGal per m/s^2.
MGAL = 1.0e5
#: Mean Earth radius used for the Bouguer cap (m), LaFehr (1991).
CAP_EARTH_RADIUS = 6_371_000.0
#: Arc length of the Bouguer cap (Hayford-Bowie zone O outer radius), m, LaFehr (1991).
CAP_ARC_LENGTH = 166_735.0


@dataclass(frozen=True)
class ReferenceEllipsoid:
    """Defining constants of a level ellipsoid.

    Attributes
    ----------
    name : str
    semimajor_axis : float
        a (m).
    flattening : float
        f (for GRS80 the value derived from J2, Moritz 1980).
    geocentric_grav_const : float
        GM (m^3/s^2).
    angular_velocity : float
        omega (rad/s).
    """

    name: str
    semimajor_axis: float
    flattening: float
    geocentric_grav_const: float
    angular_velocity: float

    @property
    def semiminor_axis(self) -> float:
        return self.semimajor_axis * (1.0 - self.flattening)

    @property
    def linear_eccentricity(self) -> float:
        a, b = self.semimajor_axis, self.semiminor_axis
        return float(np.sqrt(a * a - b * b))

    @property
    def first_eccentricity_sq(self) -> float:
        f = self.flattening
        return f * (2.0 - f)


#: Ellipsoids by name. WGS84: NIMA TR8350.2 (2000); GRS80: Moritz (1980), f derived from J2.
ELLIPSOIDS = {
    "WGS84": ReferenceEllipsoid("WGS84", 6_378_137.0, 1.0 / 298.257223563, 3.986004418e14, 7.292115e-5),
    "GRS80": ReferenceEllipsoid("GRS80", 6_378_137.0, 1.0 / 298.257222101, 3.986005e14, 7.292115e-5),
}


def get_ellipsoid(name: str) -> ReferenceEllipsoid:
    """The :class:`ReferenceEllipsoid` called ``name`` ("WGS84" or "GRS80", any case).

    Raises
    ------
    potfield.fields.errors.BadParameter
        For an unknown name.
    """
    key = str(name).upper().replace("-", "").replace(" ", "")
    if key not in ELLIPSOIDS:
        raise BadParameter(f"unknown ellipsoid '{name}'", hint=f"use one of {', '.join(ELLIPSOIDS)}")
    return ELLIPSOIDS[key]


def normal_gravity(latitude: ArrayLike, height: ArrayLike = 0.0, ellipsoid: str = "WGS84") -> np.ndarray:
    """Normal gravity (mGal) at geodetic latitude and height above the ellipsoid, closed form.

    The magnitude of the gradient of the normal potential of a level ellipsoid, evaluated
    exactly at the point (no free-air approximation) in ellipsoidal-harmonic coordinates
    (u, beta): Li and Goetze (2001, eq. 19-21), Hofmann-Wellenhof and Moritz (2006, eq. 2-113,
    2-124).  On the ellipsoid it reduces to Somigliana's formula (Hinze et al. 2005).

    Parameters
    ----------
    latitude : array_like
        Geodetic latitude (degrees).
    height : array_like
        Height above the ellipsoid (m); valid on or above the ellipsoid.
    ellipsoid : str
        "WGS84" (NIMA TR8350.2, 2000) or "GRS80" (Moritz 1980).

    Returns
    -------
    numpy.ndarray
        Normal gravity in mGal.

    References
    ----------
    Li, X. and Goetze, H.-J. (2001), Geophysics 66(6), 1660-1668.
    """
    ell = get_ellipsoid(ellipsoid)
    lat = np.radians(np.asarray(latitude, dtype=float))
    h = np.asarray(height, dtype=float)
    a, b, E = ell.semimajor_axis, ell.semiminor_axis, ell.linear_eccentricity
    omega2 = ell.angular_velocity**2
    # geodetic -> Cartesian (distance from the axis p, z)
    sinlat, coslat = np.sin(lat), np.cos(lat)
    e2 = ell.first_eccentricity_sq
    prime_vertical = a / np.sqrt(1.0 - e2 * sinlat**2)
    p = (prime_vertical + h) * coslat
    z = (prime_vertical * (1.0 - e2) + h) * sinlat
    # Cartesian -> ellipsoidal harmonic (Li and Goetze 2001, eq. 9-10)
    r2 = p * p + z * z
    d = r2 - E * E
    u2 = 0.5 * d * (1.0 + np.sqrt(1.0 + 4.0 * E * E * z * z / (d * d)))
    u = np.sqrt(u2)
    # reduced latitude beta: tan(beta) = z sqrt(u^2 + E^2) / (u p)
    beta = np.arctan2(z * np.sqrt(u2 + E * E), u * p)
    sinb2 = np.sin(beta) ** 2
    cosb2 = 1.0 - sinb2
    q0 = 0.5 * ((1.0 + 3.0 * (b / E) ** 2) * np.arctan2(E, b) - 3.0 * b / E)
    qp = 3.0 * (1.0 + u2 / E**2) * (1.0 - u / E * np.arctan2(E, u)) - 1.0
    w = np.sqrt((u2 + E * E * sinb2) / (u2 + E * E))
    gamma = (
        ell.geocentric_grav_const / (u2 + E * E)
        + omega2 * a * a * E * qp / ((u2 + E * E) * q0) * (0.5 * sinb2 - 1.0 / 6.0)
        - omega2 * u * cosb2
    ) / w
    return gamma * MGAL


def free_air_correction(
    height: ArrayLike, latitude: ArrayLike | None = None, *, order: int = 1
) -> np.ndarray:
    """Free-air (height) correction in mGal, to ADD to observed gravity.

    ``order=1``: the classic constant gradient, 0.3086 mGal/m x h (common practice).
    ``order=2``: the second-order formula of Hinze et al. (2005, eq. 4) for GRS80,
    (0.3087691 - 0.0004398 sin^2 phi) h - 7.2125e-8 h^2 (needs ``latitude``); it is the
    negative of the normal-gravity change with height (-308.697 mGal at 1000 m on the equator).

    Parameters
    ----------
    height : array_like
        Height above the ellipsoid (m).
    latitude : array_like, optional
        Geodetic latitude (degrees), for ``order=2``.
    order : {1, 2}

    Returns
    -------
    numpy.ndarray
        The correction in mGal (positive above the ellipsoid).

    References
    ----------
    Hinze, W. J., et al. (2005), Geophysics 70(4), J25-J32.
    """
    h = np.asarray(height, dtype=float)
    if order == 1:
        return 0.3086 * h
    if order == 2:
        if latitude is None:
            raise BadParameter("the second-order free-air correction needs the latitude")
        s2 = np.sin(np.radians(np.asarray(latitude, dtype=float))) ** 2
        return (0.3087691 - 0.0004398 * s2) * h - 7.2125e-8 * h * h
    raise BadParameter(f"order must be 1 or 2, not {order}")


def atmospheric_correction(height: ArrayLike) -> np.ndarray:
    """Atmospheric correction (mGal, ADDED to observed gravity): the attraction of the
    atmosphere above the station that normal gravity includes.

    0.874 - 9.9e-5 h + 3.56e-9 h^2 (Hinze et al. 2005, eq. 5; h in m).

    Parameters
    ----------
    height : array_like
        Height (m).

    Returns
    -------
    numpy.ndarray
        mGal.

    References
    ----------
    Hinze, W. J., et al. (2005), Geophysics 70(4), J25-J32.
    """
    h = np.asarray(height, dtype=float)
    return 0.874 - 9.9e-5 * h + 3.56e-9 * h * h


def bouguer_slab(height: ArrayLike, density: ArrayLike = 2670.0) -> np.ndarray:
    """Attraction (mGal) of an infinite horizontal slab of thickness ``height``: 2 pi G rho h.

    Parameters
    ----------
    height : array_like
        Slab thickness = station height (m); negative heights give a negative attraction.
    density : float or array_like
        kg/m^3.

    Returns
    -------
    numpy.ndarray
        mGal (0.04193 mGal/m per 1000 kg/m^3).

    References
    ----------
    Hinze, W. J., et al. (2005), Geophysics 70(4), J25-J32 (eq. 6); G from CODATA 2018.
    """
    h = np.asarray(height, dtype=float)
    return 2.0 * np.pi * G * np.asarray(density, dtype=float) * h * MGAL


_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(24)


def bouguer_cap(
    height: ArrayLike,
    density: ArrayLike = 2670.0,
    *,
    arc_length: float = CAP_ARC_LENGTH,
    earth_radius: float = CAP_EARTH_RADIUS,
) -> np.ndarray:
    """Attraction (mGal) of a spherical cap of thickness ``height`` out to 166.735 km.

    The cap (LaFehr 1991) lies between the sphere of radius R0 and R0 + h and spans the
    angle alpha = arc_length / R0 around the station, which sits on its top surface. Newton's
    integral over the angle is done in closed form,

        g = (pi G rho / r_p^2) int_{R0}^{r_p} r [L(r) - (r_p^2 - r^2)/L(r) + 2 r] dr,
        L(r)^2 = r_p^2 + r^2 - 2 r_p r cos(alpha),  r_p = R0 + h,

    and the remaining radial integral by 24-point Gauss-Legendre quadrature (the integrand is
    smooth, so the result is exact to rounding). The curvature ("Bullard B") term is
    ``bouguer_slab(h) - bouguer_cap(h)``, about +1.5 mGal at 1500 m.

    Parameters
    ----------
    height : array_like
        Station height = cap thickness (m). For negative heights the cap lies between the
        station and the datum, above the station, and its (negative) downward attraction is
        returned, as the slab formula 2 pi G rho h does.
    density : float or array_like
        kg/m^3.
    arc_length : float
        Surface arc radius of the cap (m), 166.735 km (LaFehr 1991).
    earth_radius : float
        R0 (m), 6371 km (LaFehr 1991).

    Returns
    -------
    numpy.ndarray
        mGal.

    References
    ----------
    LaFehr, T. R. (1991), Geophysics 56(8), 1179-1184; Hinze, W. J., et al. (2005),
    Geophysics 70(4), J25-J32.
    """
    h = np.asarray(height, dtype=float)
    rho = np.asarray(density, dtype=float)
    cos_alpha = np.cos(arc_length / earth_radius)
    rp = earth_radius + h
    # radial nodes between R0 and r_p; below the datum (h < 0) the shell lies above the
    # station and the term 2 r changes sign (the angle integral has |r_p - r| at psi = 0)
    half = 0.5 * np.abs(rp - earth_radius)
    mid = 0.5 * (rp + earth_radius)
    r = mid[..., None] + half[..., None] * _GL_NODES
    rpe = rp[..., None]
    sign = np.where(h >= 0, 1.0, -1.0)[..., None]
    length = np.sqrt(rpe * rpe + r * r - 2.0 * rpe * r * cos_alpha)
    integrand = r * (length - (rpe * rpe - r * r) / length + 2.0 * sign * r)
    integral = half * np.sum(integrand * _GL_WEIGHTS, axis=-1)
    return np.pi * G * rho * integral / (rp * rp) * MGAL
