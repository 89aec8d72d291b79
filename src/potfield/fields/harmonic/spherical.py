"""Spherical-harmonic synthesis and design matrices of internal and external potentials.

The magnetic field outside its sources, in a shell free of currents, is ``B = -grad V`` with
(Gauss 1839; Chapman and Bartels 1940, Geomagnetism, Oxford, ch. 17; Olsen, Glassmeier and Jia
2010, Space Sci. Rev. 152:135, eqs. 1-3)::

    V = a sum_n sum_m { (a/r)^(n+1) [g_n^m cos m phi + h_n^m sin m phi]
                        + (r/a)^n   [q_n^m cos m phi + s_n^m sin m phi] } P_n^m(cos theta)

with geocentric radius ``r``, colatitude ``theta``, longitude ``phi``, reference radius ``a``
(6371.2 km, as IGRF) and Schmidt semi-normalised associated Legendre functions ``P_n^m`` without
the Condon-Shortley phase. The first sum is the internal part (sources below ``r``), the second
the external part (sources above).

Components: ``B_r`` (outward), ``B_theta`` (southward), ``B_phi`` (eastward); the local
geocentric north, east, down are ``X = -B_theta``, ``Y = B_phi``, ``Z = -B_r``. The geodetic
frame differs by the angle ``psi`` between the geodetic and geocentric latitudes (Langel 1987,
"The main field", in Jacobs (ed.), Geomagnetism vol. 1, Academic Press, eqs. 51-53).

Coefficient order (that of IGRF tables): ``g10, g11, h11, g20, g21, h21, g22, h22, ...``; the
external ones ``q10, q11, s11, ...`` in the same slots. Everything is linear in the coefficients:
:func:`design_matrices` gives the matrices whose product with a coefficient vector is the field,
which is what least-squares separation needs (potfield.fields.harmonic.separation).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from ..errors import BadGeometry, BadParameter
from ..magnetic.igrf import REFERENCE_RADIUS_M, geodetic_to_geocentric

__all__ = [
    "coefficient_index",
    "coefficient_names",
    "n_coefficients",
    "degree_of",
    "schmidt_legendre",
    "design_matrices",
    "geodetic_design_matrices",
    "synthesis",
    "geodetic_synthesis",
    "REFERENCE_RADIUS_M",
]

SOURCES = ("internal", "external")


def n_coefficients(nmax: int) -> int:
    """Number of Gauss coefficients of degrees 1..nmax: ``nmax (nmax + 2)``."""
    return int(nmax) * (int(nmax) + 2)


def degree_of(count: int) -> int:
    """The degree ``nmax`` with ``nmax (nmax + 2) == count`` (ValueError when there is none)."""
    nmax = int(round(np.sqrt(count + 1) - 1))
    if nmax < 0 or n_coefficients(nmax) != count:
        raise BadGeometry(f"{count} coefficients is not nmax (nmax + 2) for any degree nmax")
    return nmax


def coefficient_index(nmax: int) -> list[tuple[int, int, bool]]:
    """``(n, m, is_sine)`` per coefficient in the IGRF order (g10, g11, h11, g20, ...)."""
    out = []
    for n in range(1, int(nmax) + 1):
        out.append((n, 0, False))
        for m in range(1, n + 1):
            out.append((n, m, False))
            out.append((n, m, True))
    return out


def coefficient_names(nmax: int, source: str = "internal") -> list[str]:
    """Names ``g10, g11, h11, ...`` (internal) or ``q10, q11, s11, ...`` (external).

    Degrees and orders above 9 are written with an underscore (``g10_3`` = degree 10, order 3)
    so that names stay unambiguous.
    """
    _check_source(source)
    cos_letter, sin_letter = ("g", "h") if source == "internal" else ("q", "s")
    names = []
    for n, m, is_sine in coefficient_index(nmax):
        letter = sin_letter if is_sine else cos_letter
        names.append(f"{letter}{n}{m}" if n < 10 else f"{letter}{n}_{m}")
    return names


def _check_source(source: str) -> None:
    if source not in SOURCES:
        raise BadParameter(f"source must be 'internal' or 'external', not {source!r}")


def schmidt_legendre(nmax: int, colatitude: ArrayLike) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Schmidt semi-normalised associated Legendre functions and their colatitude derivatives.

    ``P_n^m(cos theta)`` with ``P_n^0`` unnormalised and ``P_n^m`` scaled by
    ``sqrt(2 (n-m)! / (n+m)!)`` for ``m > 0``, no Condon-Shortley phase (Chapman and Bartels
    1940; Winch et al. 2005, Geophys. J. Int. 160:487). Computed by the standard recursions in
    degree for each order, seeded with the sectoral terms ``P_m^m = sqrt((2m-1)/(2m)) sin theta
    P_(m-1)^(m-1)`` (Langel 1987, in Jacobs (ed.), Geomagnetism vol. 1, Academic Press):

    ``P_n^m = [(2n-1) cos theta P_(n-1)^m - sqrt((n-1)^2 - m^2) P_(n-2)^m] / sqrt(n^2 - m^2)``.

    ``P_n^m / sin theta`` is computed by the same recursion seeded with ``P_m^m / sin theta``, so
    it stays finite at the poles.

    Parameters
    ----------
    nmax : int
        Highest degree.
    colatitude : array_like
        Geocentric colatitude (degrees).

    Returns
    -------
    P, dP, P_sin : numpy.ndarray
        Arrays of shape ``(nmax + 1, nmax + 1) + colatitude.shape`` indexed ``[n, m]``:
        ``P_n^m``, ``dP_n^m / d theta`` (per radian) and ``P_n^m / sin theta`` (zero where
        ``m = 0``). Entries with ``m > n`` are zero.
    """
    nmax = int(nmax)
    theta = np.radians(np.asarray(colatitude, dtype=float))
    ct, st = np.cos(theta), np.sin(theta)
    shape = (nmax + 1, nmax + 1) + theta.shape
    P = np.zeros(shape)
    dP = np.zeros(shape)
    Q = np.zeros(shape)
    P[0, 0] = 1.0
    for m in range(nmax + 1):  # loops over degree and order (a few terms), not over points
        if m == 1:
            P[1, 1], dP[1, 1], Q[1, 1] = st, ct, 1.0
        elif m >= 2:
            c = np.sqrt((2.0 * m - 1.0) / (2.0 * m))
            P[m, m] = c * st * P[m - 1, m - 1]
            dP[m, m] = c * (ct * P[m - 1, m - 1] + st * dP[m - 1, m - 1])
            Q[m, m] = c * st * Q[m - 1, m - 1]
        for n in range(m + 1, nmax + 1):
            a = (2.0 * n - 1.0) / np.sqrt(n * n - m * m)
            b = np.sqrt(((n - 1.0) ** 2 - m * m) / (n * n - m * m)) if n - 2 >= m else 0.0
            P[n, m] = a * ct * P[n - 1, m] - (b * P[n - 2, m] if b else 0.0)
            dP[n, m] = a * (ct * dP[n - 1, m] - st * P[n - 1, m]) - (b * dP[n - 2, m] if b else 0.0)
            if m > 0:
                Q[n, m] = a * ct * Q[n - 1, m] - (b * Q[n - 2, m] if b else 0.0)
    return P, dP, Q


def design_matrices(
    radius: ArrayLike,
    colatitude: ArrayLike,
    longitude: ArrayLike,
    nmax: int,
    source: str = "internal",
    reference_radius: float = REFERENCE_RADIUS_M,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Matrices mapping Gauss coefficients to ``(B_r, B_theta, B_phi)`` at points.

    For an internal coefficient ``g_n^m`` (``h``: cos -> sin, and the sign of the ``B_phi``
    term flips) with ``rho = a / r`` (Chapman and Bartels 1940; Olsen, Glassmeier and Jia 2010,
    Space Sci. Rev. 152:135)::

        B_r     =  (n + 1) rho^(n+2) cos(m phi) P_n^m
        B_theta = -rho^(n+2) cos(m phi) dP_n^m / d theta
        B_phi   =  rho^(n+2) m sin(m phi) P_n^m / sin theta

    and for an external one ``q_n^m`` the radial factor ``(n + 1) rho^(n+2)`` becomes
    ``-n (r/a)^(n-1)`` and the horizontal factor ``rho^(n+2)`` becomes ``(r/a)^(n-1)``.

    Parameters
    ----------
    radius : array_like
        Geocentric radius (m).
    colatitude, longitude : array_like
        Geocentric colatitude and longitude (degrees); the three inputs broadcast to the points'
        shape ``S``.
    nmax : int
        Highest degree.
    source : {"internal", "external"}
    reference_radius : float
        ``a`` (m); default 6371.2 km (IGRF).

    Returns
    -------
    G_r, G_theta, G_phi : numpy.ndarray
        Shape ``S + (nmax (nmax + 2),)``: ``B_r = G_r @ coefficients`` etc. (nT when the
        coefficients are in nT).
    """
    _check_source(source)
    r, th, ph = np.broadcast_arrays(
        np.asarray(radius, dtype=float),
        np.asarray(colatitude, dtype=float),
        np.asarray(longitude, dtype=float),
    )
    nmax = int(nmax)
    P, dP, Q = schmidt_legendre(nmax, th)
    rho = r / float(reference_radius)
    lam = np.radians(ph)
    index = coefficient_index(nmax)
    out = np.zeros((3,) + r.shape + (len(index),))
    for k, (n, m, is_sine) in enumerate(index):  # loop over coefficients
        if source == "internal":
            radial, horizontal = (n + 1) * rho ** (-(n + 2)), rho ** (-(n + 2))
        else:
            radial, horizontal = -n * rho ** (n - 1), rho ** (n - 1)
        if is_sine:
            trig, dtrig = np.sin(m * lam), -np.cos(m * lam)  # sin(m phi); -(1/m) d/dphi
        else:
            trig, dtrig = np.cos(m * lam), np.sin(m * lam)
        out[0, ..., k] = radial * trig * P[n, m]
        out[1, ..., k] = -horizontal * trig * dP[n, m]
        out[2, ..., k] = horizontal * m * dtrig * Q[n, m]
    return out[0], out[1], out[2]


def _psi(latitude, height):
    """Geocentric radius, colatitude and psi = geodetic - geocentric latitude (radians)."""
    radius, lat_c = geodetic_to_geocentric(latitude, height)
    psi = np.radians(np.asarray(latitude, dtype=float) - lat_c)
    return radius, 90.0 - lat_c, psi


def geodetic_design_matrices(
    longitude: ArrayLike,
    latitude: ArrayLike,
    height: ArrayLike,
    nmax: int,
    source: str = "internal",
    reference_radius: float = REFERENCE_RADIUS_M,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Matrices mapping Gauss coefficients to geodetic north, east, down at geodetic positions.

    The positions are converted to geocentric coordinates on the WGS84 ellipsoid and the
    geocentric ``X = -B_theta``, ``Z = -B_r`` are rotated by ``psi`` (geodetic minus geocentric
    latitude): ``north = X cos psi + Z sin psi``, ``down = -X sin psi + Z cos psi``,
    ``east = B_phi`` (Langel 1987, in Jacobs (ed.), Geomagnetism vol. 1, Academic Press,
    eqs. 51-53).

    Parameters
    ----------
    longitude, latitude : array_like
        Geodetic WGS84 coordinates (degrees).
    height : array_like
        Height above the ellipsoid (m).
    nmax, source, reference_radius
        As :func:`design_matrices`.

    Returns
    -------
    G_north, G_east, G_down : numpy.ndarray
        Shape ``S + (nmax (nmax + 2),)``.
    """
    lon, lat, h = np.broadcast_arrays(
        np.asarray(longitude, dtype=float), np.asarray(latitude, dtype=float), np.asarray(height, dtype=float)
    )
    radius, colat, psi = _psi(lat, h)
    g_r, g_t, g_p = design_matrices(radius, colat, lon, nmax, source, reference_radius)
    cpsi, spsi = np.cos(psi)[..., None], np.sin(psi)[..., None]
    xs, zs = -g_t, -g_r
    return xs * cpsi + zs * spsi, g_p, -xs * spsi + zs * cpsi


def synthesis(
    coefficients: ArrayLike,
    radius: ArrayLike,
    colatitude: ArrayLike,
    longitude: ArrayLike,
    source: str = "internal",
    reference_radius: float = REFERENCE_RADIUS_M,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Field of an internal or external potential at geocentric points.

    Parameters
    ----------
    coefficients : array_like, shape (..., nmax (nmax + 2))
        Gauss coefficients (nT) in the IGRF order; leading dimensions (e.g. time) are kept.
    radius, colatitude, longitude : array_like
        Geocentric points (m, degrees), broadcast to shape ``S`` (1-D or scalar).
    source : {"internal", "external"}
    reference_radius : float
        ``a`` (m).

    Returns
    -------
    B_r, B_theta, B_phi : numpy.ndarray
        Shape ``coefficients.shape[:-1] + S`` (nT).

    References
    ----------
    Chapman and Bartels (1940), Geomagnetism, Oxford; Olsen, Glassmeier and Jia (2010), Space
    Sci. Rev. 152:135.
    """
    coefficients = np.asarray(coefficients, dtype=float)
    nmax = degree_of(coefficients.shape[-1])
    mats = design_matrices(radius, colatitude, longitude, nmax, source, reference_radius)
    return tuple(
        np.einsum("...k,sk->...s", coefficients, np.atleast_1d(g).reshape(-1, g.shape[-1])).reshape(
            coefficients.shape[:-1] + g.shape[:-1]
        )
        for g in mats
    )


def geodetic_synthesis(
    coefficients: ArrayLike,
    longitude: ArrayLike,
    latitude: ArrayLike,
    height: ArrayLike,
    source: str = "internal",
    reference_radius: float = REFERENCE_RADIUS_M,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Geodetic north, east, down (nT) of an internal or external potential.

    As :func:`synthesis` with positions given geodetically (see
    :func:`geodetic_design_matrices`). Output shape ``coefficients.shape[:-1] + S``.
    """
    coefficients = np.asarray(coefficients, dtype=float)
    nmax = degree_of(coefficients.shape[-1])
    mats = geodetic_design_matrices(longitude, latitude, height, nmax, source, reference_radius)
    return tuple(
        np.einsum("...k,sk->...s", coefficients, np.atleast_1d(g).reshape(-1, g.shape[-1])).reshape(
            coefficients.shape[:-1] + g.shape[:-1]
        )
        for g in mats
    )
