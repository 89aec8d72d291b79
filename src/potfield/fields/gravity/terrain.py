"""Terrain correction from a DEM grid with right-rectangular prisms.

Definition and sign
-------------------
The terrain correction TC at a station is the attraction of the Bouguer shell through the
station (thickness = station height) minus the attraction of the real topography, both taken
over the same area out to ``radius`` (166.7 km by default, Hayford-Bowie zone O):

    TC = g_z(shell 0..h_station) - g_z(topography 0..h_terrain)

Cell by cell this is the attraction of the prism between the terrain and the station height,
counted positive both for hills above the station (their mass pulls upward) and for valleys
below it (the shell assumed mass that is not there). So the classic terrain correction is
positive on a flat-Earth and is ADDED: complete Bouguer anomaly = free-air anomaly - Bouguer
correction + TC (Hammer 1939; Hinze et al. 2005).

Zones
-----
Near the station the full-resolution DEM is used (out to at least ``inner_radius``); farther out
the DEM is block-averaged by 4, 16, 64, ... so that a cell is never larger than
``distance / far_ratio``. The zones tile the plane exactly: each coarse zone has a square hole
made of whole coarse cells that the next finer zone fills. The station's own full-resolution
cell is given the ground elevation at the station (by default the station height, so for a
ground station it contributes nothing): a station then never sits inside or below the mass of
its own prism, the classic pitfall of prism terrain corrections when the DEM cell mean differs
from the station height (common practice; the innermost Hammer zone A is usually neglected for
the same reason). For readings above the ground (airborne) pass ``ground=NaN`` to keep the DEM
value of the own cell.

Earth curvature
---------------
Beyond a few km the Earth's surface falls away from the station's tangent plane by about
d^2 / (2 R) (2.2 km at 166.7 km). With ``curvature=True`` the top and bottom of every prism are
lowered by that amount, so the terrain correction is taken relative to a spherical shell (the
Bouguer cap of :func:`potfield.fields.gravity.reductions.bouguer_cap`), not a flat slab. The tilt of the
local vertical (d/R, 1.5 degrees at 166.7 km) is neglected. Flat-Earth terrain
(``curvature=False``) is adequate within about 20 km (common practice); beyond about 100 km the
curvature drop is larger than most relief and must be applied.

The prism attraction is the closed form of Nagy et al. (2000) as implemented by choclo (the
kernel library of harmonica), called from a numba kernel that runs in parallel over stations.

References
----------
* Hammer, S. (1939). Terrain corrections for gravimeter stations. Geophysics, 4(3), 184-194.
* Nagy, D., Papp, G. and Benedek, J. (2000). The gravitational potential and its derivatives
  for the prism. Journal of Geodesy, 74(7-8), 552-560.
* Hinze, W. J., et al. (2005). New standards for reducing gravity data: The North American
  gravity database. Geophysics, 70(4), J25-J32.
* LaFehr, T. R. (1991). An exact solution for the gravity curvature (Bullard B) correction.
  Geophysics, 56(8), 1179-1184.
* Fukushima, T. (2020). Speed and accuracy improvements in standard algorithm for prismatic
  gravitational field. Geophysical Journal International, 222(3), 1898-1908.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numba
import numpy as np
from choclo.prism import gravity_u
from numpy.typing import ArrayLike

from ..errors import BadGeometry, BadParameter, NotEnoughData

if TYPE_CHECKING:
    import xarray as xr

#: Block-averaging factor between successive zones.
ZONE_FACTOR = 4
#: Mean Earth radius (m) for the curvature drop (LaFehr 1991).
EARTH_RADIUS = 6_371_000.0


@dataclass
class TerrainResult:
    """Terrain correction at stations and what it was computed from.

    Attributes
    ----------
    correction : numpy.ndarray
        Terrain correction (mGal), to ADD to the simple Bouguer anomaly.
    missing_fraction : numpy.ndarray
        Fraction of the disc of ``radius`` around each station not covered by the DEM (or NaN
        cells); terrain there is taken at the station height (no contribution).
    zone_spacings : list of (float, float)
        Cell size (east, north) of each zone, finest first.
    zone_inner_distance : list of float
        Smallest distance (m) at which each zone's cells are used (0 for the finest).
    warnings : list of str
    """

    correction: np.ndarray
    missing_fraction: np.ndarray
    zone_spacings: list = field(default_factory=list)
    zone_inner_distance: list = field(default_factory=list)
    warnings: list = field(default_factory=list)


def _grid_geometry(dem):
    """Origin (west/south cell edges), spacings and values of an ascending regular grid."""
    east = np.asarray(dem["easting"].values, dtype=float)
    north = np.asarray(dem["northing"].values, dtype=float)
    values = np.asarray(dem.transpose("northing", "easting").values, dtype=float)
    if east.size < 2 or north.size < 2:
        raise NotEnoughData("the DEM needs at least 2 x 2 cells")
    dx, dy = np.diff(east), np.diff(north)
    if np.any(dx <= 0) or np.any(dy <= 0):
        raise BadGeometry("DEM coordinates must be ascending (use potfield.io.grids.ascending)")
    if np.ptp(dx) > 1e-6 * abs(dx[0]) or np.ptp(dy) > 1e-6 * abs(dy[0]):
        raise BadGeometry("the DEM is not a regular grid")
    dx0, dy0 = float(dx.mean()), float(dy.mean())
    return east[0] - dx0 / 2, north[0] - dy0 / 2, dx0, dy0, values


def _block_mean(values, factor):
    """Mean of factor x factor blocks ignoring NaN (ragged edge blocks kept; all-NaN -> NaN)."""
    if factor == 1:
        return values.copy()
    ny, nx = values.shape
    rows, cols = np.arange(0, ny, factor), np.arange(0, nx, factor)
    valid = np.isfinite(values)
    filled = np.where(valid, values, 0.0)
    total = np.add.reduceat(np.add.reduceat(filled, rows, axis=0), cols, axis=1)
    count = np.add.reduceat(np.add.reduceat(valid.astype(np.int64), rows, axis=0), cols, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def _zone_plan(dx0, dy0, inner_radius, radius, far_ratio):
    """Block factors and hole half-widths (in cells of each zone) of the zone pyramid."""
    factors, holes, inner = [1], [0], [0.0]
    k = 1
    while True:
        f = ZONE_FACTOR**k
        s = max(dx0, dy0) * f
        # zone k starts beyond far_ratio cells of its own size (and zone 1 beyond inner_radius)
        need = max(inner_radius, far_ratio * s) if k == 1 else far_ratio * s
        hole = int(np.ceil(need / s + 0.5))
        hole = max(hole, -(-holes[-1] // ZONE_FACTOR) + 1)
        # distance at which this zone's cells start (at least)
        start = (hole - 0.5) * min(dx0, dy0) * f
        if start >= radius or k > 12:
            break
        factors.append(f)
        holes.append(hole)
        inner.append(start)
        k += 1
    return factors, holes, inner


@numba.njit(parallel=True)
def _terrain_kernel(
    x,
    y,
    h,
    ground,
    z_flat,
    offsets,
    nys,
    nxs,
    factors,
    holes,
    x0,
    y0,
    dx0,
    dy0,
    density,
    radius,
    curvature,
    earth_radius,
    out,
    missing,
):
    nlev = factors.size
    r2max = radius * radius
    for p in numba.prange(x.size):
        xs, ys, hs = x[p], y[p], h[p]
        i0 = int(np.floor((ys - y0) / dy0))
        j0 = int(np.floor((xs - x0) / dx0))
        total = 0.0
        lost = 0.0
        for k in range(nlev):
            f = factors[k]
            sx = dx0 * f
            sy = dy0 * f
            ik = i0 // f
            jk = j0 // f
            if k == nlev - 1:
                n_i = int(radius / sy) + 2
                n_j = int(radius / sx) + 2
                ilo, ihi = ik - n_i, ik + n_i
                jlo, jhi = jk - n_j, jk + n_j
            else:
                fn = factors[k + 1] // f
                fk1 = factors[k + 1]
                ikn = i0 // fk1
                jkn = j0 // fk1
                mn = holes[k + 1]
                ilo, ihi = (ikn - mn) * fn, (ikn + mn + 1) * fn - 1
                jlo, jhi = (jkn - mn) * fn, (jkn + mn + 1) * fn - 1
            ny, nx, off = nys[k], nxs[k], offsets[k]
            hole = holes[k]
            for ii in range(ilo, ihi + 1):
                yc = y0 + (ii + 0.5) * sy
                for jj in range(jlo, jhi + 1):
                    if k > 0 and abs(ii - ik) <= hole and abs(jj - jk) <= hole:
                        continue
                    xc = x0 + (jj + 0.5) * sx
                    d2 = (xc - xs) ** 2 + (yc - ys) ** 2
                    if d2 > r2max:
                        continue
                    if ii < 0 or ii >= ny or jj < 0 or jj >= nx:
                        lost += sx * sy
                        continue
                    zc = z_flat[off + ii * nx + jj]
                    if np.isnan(zc):
                        lost += sx * sy
                        continue
                    if k == 0 and ii == i0 and jj == j0 and not np.isnan(ground[p]):
                        zc = ground[p]
                    drop = d2 / (2.0 * earth_radius) if curvature else 0.0
                    if zc > hs:
                        bottom, top, sign = hs - drop, zc - drop, 1.0
                    elif zc < hs:
                        bottom, top, sign = zc - drop, hs - drop, -1.0
                    else:
                        continue
                    total += sign * gravity_u(
                        xs,
                        ys,
                        hs,
                        xc - 0.5 * sx,
                        xc + 0.5 * sx,
                        yc - 0.5 * sy,
                        yc + 0.5 * sy,
                        bottom,
                        top,
                        density,
                    )
        out[p] = total * 1e5
        missing[p] = lost / (np.pi * r2max)


def terrain_correction(
    easting: ArrayLike,
    northing: ArrayLike,
    height: ArrayLike,
    dem: xr.DataArray,
    *,
    density: float = 2670.0,
    radius: float = 166_700.0,
    inner_radius: float = 2_000.0,
    far_ratio: float = 8.0,
    curvature: bool = True,
    earth_radius: float = EARTH_RADIUS,
    missing_tolerance: float = 0.01,
    ground: xr.DataArray | None = None,
) -> TerrainResult:
    """Terrain correction (mGal, positive, ADDED to the simple Bouguer anomaly) at stations.

    Parameters
    ----------
    easting, northing : array_like
        Station coordinates (m) in the DEM's projected CRS.
    height : array_like
        Station heights (m) on the same vertical datum as the DEM.
    dem : xarray.DataArray
        Elevation (m) on a regular grid with ascending ``easting`` and ``northing`` (m).
        NaN cells are treated like missing coverage.
    density : float
        Topographic density (kg/m^3).
    radius : float
        Outer radius of the correction (m); 166.7 km is the standard (Hinze et al. 2005).
    inner_radius : float
        Radius (m) within which the full-resolution DEM is used.
    far_ratio : float
        Coarser zones keep cell size <= distance / far_ratio.
    curvature : bool
        Lower prisms by d^2 / (2 R) (terrain relative to the spherical cap); see module notes.
    earth_radius : float
        R for the curvature drop (m).
    missing_tolerance : float
        Stations whose disc of ``radius`` is less covered than 1 - this get a warning.
    ground : array_like, optional
        Terrain elevation at each station, used for the station's own full-resolution cell
        instead of the DEM cell mean. None (default) = the station height: ground stations,
        whose own cell then contributes nothing. NaN entries (e.g. airborne readings) keep the
        DEM value of the own cell, which is safe whenever the station is above it.

    Returns
    -------
    TerrainResult

    Notes
    -----
    Sign and zones: see the module docstring. Cost grows with the number of prisms per station
    (about 40 000 for a 30 m DEM, 2 km inner radius and 166.7 km outer radius).

    References
    ----------
    Hammer, S. (1939), Geophysics 4(3), 184-194; Nagy, D., Papp, G. and Benedek, J. (2000),
    J. Geodesy 74, 552-560; Hinze, W. J., et al. (2005), Geophysics 70(4), J25-J32;
    LaFehr, T. R. (1991), Geophysics 56(8), 1179-1184.
    """
    x = np.ascontiguousarray(np.asarray(easting, dtype=float).ravel())
    y = np.ascontiguousarray(np.asarray(northing, dtype=float).ravel())
    h = np.ascontiguousarray(np.broadcast_to(np.asarray(height, dtype=float), np.shape(easting)).ravel())
    if ground is None:
        gr = h.copy()
    else:
        gr = np.ascontiguousarray(np.broadcast_to(np.asarray(ground, dtype=float), h.shape).ravel())
    if not (x.size == y.size == h.size):
        raise BadGeometry("easting, northing and height must have the same size")
    if not (radius > 0 and inner_radius >= 0 and far_ratio > 0):
        raise BadParameter("radius and far_ratio must be positive, inner_radius >= 0")
    x0, y0, dx0, dy0, values = _grid_geometry(dem)
    factors, holes, inner = _zone_plan(dx0, dy0, inner_radius, radius, far_ratio)
    levels = [_block_mean(values, f) for f in factors]
    offsets = np.cumsum([0] + [lv.size for lv in levels[:-1]]).astype(np.int64)
    z_flat = np.concatenate([lv.ravel() for lv in levels])
    nys = np.array([lv.shape[0] for lv in levels], dtype=np.int64)
    nxs = np.array([lv.shape[1] for lv in levels], dtype=np.int64)
    out = np.zeros(x.size)
    missing = np.zeros(x.size)
    finite = np.isfinite(x) & np.isfinite(y) & np.isfinite(h)
    if finite.any():
        sub_out = np.zeros(int(finite.sum()))
        sub_missing = np.zeros(int(finite.sum()))
        _terrain_kernel(
            x[finite],
            y[finite],
            h[finite],
            gr[finite],
            z_flat,
            offsets,
            nys,
            nxs,
            np.asarray(factors, dtype=np.int64),
            np.asarray(holes, dtype=np.int64),
            x0,
            y0,
            dx0,
            dy0,
            float(density),
            float(radius),
            bool(curvature),
            float(earth_radius),
            sub_out,
            sub_missing,
        )
        out[finite] = sub_out
        missing[finite] = sub_missing
    out[~finite] = np.nan
    missing[~finite] = np.nan
    warnings = []
    short = np.flatnonzero(missing > missing_tolerance)
    if short.size:
        worst = int(short[np.nanargmax(missing[short])])
        warnings.append(
            f"the DEM does not cover the {radius / 1000:g} km terrain radius around "
            f"{short.size} of {x.size} stations (worst: station index {worst}, "
            f"{100 * missing[worst]:.1f} % of the area missing); terrain there was taken at the "
            "station height, so the correction is too small: extend the DEM or reduce "
            "reference.terrain_radius_m"
        )
    spacings = [(dx0 * f, dy0 * f) for f in factors]
    return TerrainResult(out, missing, spacings, inner, warnings)
