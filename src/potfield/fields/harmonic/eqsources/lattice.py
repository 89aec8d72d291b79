"""The source lattice of the FFT route: layout, height levels, source heights and the
block-Toeplitz (BTTB) operator applied by FFT.

Sources sit on the occupied nodes of a regular horizontal lattice; the lattice-to-lattice part
of the Jacobian is block-Toeplitz with Toeplitz blocks between a few horizontal source planes and
data height levels (sources spread over the planes by Lagrange weights in height) and is applied
with real FFTs of its circulant embedding (Takahashi, Oliveira and Barbosa 2020, Geophysics
85(6):G129). The tuning constants below were chosen by measurement; the figures are in
DEVELOPERS.md ("Equivalent sources: measured choices").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.fft
from numpy.typing import ArrayLike

from ..._numerics import group_median
from .kernels import _mix_spectra

#: Half-width (lattice cells) of the exact near field around each datum: the whole operator
#: stays within 1e-5 (relative RMS) of the exact kernel.
NEAR_CELLS = 4
#: Height above the highest source (lattice spacings) from which predictions skip the near
#: field (the order-6 interpolation of the 1/r kernel is then exact to ~3e-5 of a source's peak).
NEAR_FREE_HEIGHT = 6.0
#: Order (nodes per axis) of the horizontal Lagrange interpolation from the lattice.
INTERP_ORDER = 6
#: Offsets (cells, max-norm) at which the lattice kernel is replaced by zero: the far field
#: (sources beyond NEAR_CELLS) reaches the interpolation stencil of a datum at two cells or more,
#: so these values only ever serve near sources, which the exact near field corrects.
CORE_CELLS = 1
#: Node offsets (cells) covered by the kernel table of the near-field correction.
TABLE_REACH = NEAR_CELLS + INTERP_ORDER
#: Height levels (and source planes) per lattice spacing of height range, see _levels.
LEVELS_PER_SPACING = 1.0
#: Source depth per lattice spacing: the lattice is never finer than the blocks and never
#: coarser than depth / DEPTH_PER_SPACING (Dampney 1969, Geophysics 34:39: a layer 2.5 to 6
#: grid spacings deep represents the field without aliasing). Deep layers get proportionally
#: fewer sources: fewer unknowns, smaller FFTs, fewer height levels.
DEPTH_PER_SPACING = 4.0


def source_spacing(depth: float, block_size: float) -> float:
    """Lattice spacing (m) of the FFT route for a layer ``depth`` deep over ``block_size`` blocks:
    ``max(block_size, depth / DEPTH_PER_SPACING)`` (Dampney 1969)."""
    return max(float(block_size), float(depth) / DEPTH_PER_SPACING)


def height_levels(zmin: float, zmax: float, dx: float) -> np.ndarray:
    """Chebyshev height levels covering [zmin, zmax] for the vertical interpolation.

    The number grows with the height range relative to the lattice spacing so that the smooth
    far field (sources at least ~3.5 cells away) is interpolated to better than 1e-4 relative
    (Chebyshev nodes avoid the Runge oscillation; Trefethen 2013, Approximation Theory and
    Approximation Practice, SIAM); one level per lattice spacing, at least three (DEVELOPERS.md
    lists the measured alternatives).
    """
    span = zmax - zmin
    if span <= 1e-6 * dx:
        return np.array([0.5 * (zmin + zmax)])
    count = int(np.clip(np.ceil(LEVELS_PER_SPACING * span / dx) + 1, 3, 12))
    k = np.arange(count)
    # Chebyshev points of the second kind (include both ends).
    nodes = 0.5 * (zmin + zmax) - 0.5 * span * np.cos(np.pi * k / (count - 1))
    return nodes


@dataclass
class Lattice:
    """A regular horizontal lattice: nodes at (x0 + i dx, y0 + j dx)."""

    x0: float
    y0: float
    dx: float
    nx: int
    ny: int

    @classmethod
    def covering(
        cls, dx: float, west: float, east: float, south: float, north: float, margin: int
    ) -> Lattice:
        x0 = west - margin * dx
        y0 = south - margin * dx
        nx = int(np.ceil((east - x0) / dx - 1e-9)) + margin + 1
        ny = int(np.ceil((north - y0) / dx - 1e-9)) + margin + 1
        return cls(float(x0), float(y0), float(dx), int(nx), int(ny))


def lattice_kernel(
    ox: ArrayLike, oy: ArrayLike, dz: float, dx: float, scale: float, core: bool
) -> np.ndarray:
    """Lattice kernel ``scale / r`` between nodes offset by (ox, oy) cells and heights ``dz``
    apart; with ``core`` it is zero where both offsets are at most CORE_CELLS (values only ever
    used for near sources, whose interpolated field the near-field correction removes again:
    keeps the kernel finite when a source plane and a data level are at the same height)."""
    ox, oy = np.asarray(ox, dtype=float), np.asarray(oy, dtype=float)
    r2 = (ox * dx) ** 2 + (oy * dx) ** 2 + dz**2
    inside = np.maximum(np.abs(ox), np.abs(oy)) <= CORE_CELLS
    if core:
        r2 = np.where(inside, 1.0, r2)
    kernel = scale / np.sqrt(r2)
    return np.where(inside, 0.0, kernel) if core else kernel


def kernel_table(
    zl: np.ndarray, zp: np.ndarray, dx: float, scale: float, reach: int, core: bool
) -> np.ndarray:
    """``table[l, oy + reach, ox + reach, p]``: the lattice kernel between level ``zl[l]`` and
    plane ``zp[p]`` at node offsets up to ``reach`` cells (what the near-field correction
    subtracts; the same values as the convolver's)."""
    off = np.arange(-reach, reach + 1, dtype=float)
    table = np.empty((zl.size, off.size, off.size, zp.size))
    for lev, z in enumerate(zl):
        for p, h in enumerate(zp):
            table[lev, :, :, p] = lattice_kernel(off[None, :], off[:, None], z - h, dx, scale, core)
    return table


class Convolver:
    """BTTB products for sources on lattice planes at heights ``zp`` and outputs on the same
    lattice at heights ``zl``, by FFT of the circulant embedding (Takahashi et al. 2020,
    Geophysics 85(6):G129): ``out_l = sum_p T_lp g_p``. The kernel is even in both offsets, so
    every T_lp is symmetric and the adjoint is ``g_p = sum_l T_lp out_l``."""

    def __init__(
        self, lattice: Lattice, zl: np.ndarray, zp: np.ndarray, scale: float, core: bool = True
    ) -> None:
        self.lattice = lattice
        ny, nx = lattice.ny, lattice.nx
        self.shape = (
            scipy.fft.next_fast_len(2 * ny - 1, real=True),
            scipy.fft.next_fast_len(2 * nx - 1, real=True),
        )
        py, px = self.shape
        oy = np.arange(py, dtype=float)
        oy[oy >= py / 2] -= py
        ox = np.arange(px, dtype=float)
        ox[ox >= px / 2] -= px
        # Double precision throughout: with single-precision FFTs the adjoint is the forward's
        # transpose only to ~1e-7, which at small dampings doubles the CGLS iterations. The
        # kernel is real and even, so its spectra are real: stored as real numbers.
        self.spectra = np.empty((len(zl), len(zp), py, px // 2 + 1))
        for lev, z in enumerate(zl):
            for p, h in enumerate(zp):
                kernel = lattice_kernel(ox[None, :], oy[:, None], z - h, lattice.dx, scale, core)
                self.spectra[lev, p] = scipy.fft.rfft2(kernel, workers=-1).real

    def _apply(self, grids, adjoint):
        """out_k = sum_m S_km FFT(grids[m]) (S_mk for the adjoint), back on the lattice."""
        _, ny, nx = grids.shape
        specs = scipy.fft.rfft2(grids, s=self.shape, axes=(1, 2), workers=-1)
        count = self.spectra.shape[1] if adjoint else self.spectra.shape[0]
        mixed = np.empty((count,) + specs.shape[1:], dtype=complex)
        _mix_spectra(specs, self.spectra, adjoint, mixed)
        del specs
        # inverse along northing, keep the lattice rows, then along easting (a quarter less work
        # than the full inverse)
        rows = scipy.fft.ifft(mixed, axis=1, workers=-1)[:, :ny]
        return scipy.fft.irfft(rows, n=self.shape[1], axis=2, workers=-1)[:, :, :nx]

    def forward(self, grids: np.ndarray) -> np.ndarray:
        """(P, ny, nx) source grids on the planes -> (L, ny, nx) fields at the levels."""
        return self._apply(grids, False)

    def adjoint(self, grids: np.ndarray) -> np.ndarray:
        """(L, ny, nx) -> (P, ny, nx): ``sum_l T_lp g_l`` (T_lp symmetric)."""
        return self._apply(grids, True)


def capped(heights: np.ndarray, ceiling: float | None) -> np.ndarray:
    """Source heights not above ``ceiling`` (m; None = no cap)."""
    return heights if ceiling is None else np.minimum(heights, float(ceiling))


def layer_ceiling(grid_height: float | str | None, depth: float) -> float | None:
    """Highest source height (m) under a grid at constant ``grid_height`` for a layer ``depth``
    deep: half the depth below the grid, so a layer following high ground never reaches up to
    a grid flown lower (None for a drape grid, ``grid_height`` None or "drape")."""
    if grid_height is None or grid_height == "drape":
        return None
    return float(grid_height) - 0.5 * float(depth)


def constant_plane(u: np.ndarray, depth: float, ceiling: float | None = None) -> float:
    """Height of a constant-depth layer: ``depth`` below the median data height and at least
    ``depth / 2`` below every datum (and not above ``ceiling``)."""
    return float(capped(min(float(np.median(u)) - depth, float(u.min()) - 0.5 * depth), ceiling))


def source_heights(
    u: np.ndarray,
    groups: np.ndarray,
    cells: tuple[np.ndarray, np.ndarray],
    shape: tuple[int, int],
    depth: float,
    depth_type: str = "relative",
    ceiling: float | None = None,
) -> tuple[np.ndarray, float]:
    """Heights of lattice sources and the kernel scale.

    ``"relative"``: each source ``depth`` below the median height of the data at its lattice
    node (sources follow a draped survey; relative depth of Cordell 1992 on the block-averaged
    positions of Soler and Uieda 2021), and at least ``depth / 2`` below every datum within
    NEAR_CELLS nodes. ``"constant"``: one plane ``depth`` below the median data height and at
    least ``depth / 2`` below every datum. ``ceiling`` (m), when given, caps every source.

    Parameters
    ----------
    u : array
        Data heights (m).
    groups : int array
        Source (lattice node) number of every datum, 0 .. S-1, every source with data.
    cells : (int array, int array)
        Lattice row and column of every source.
    shape : (int, int)
        Lattice shape (rows, columns).
    depth : float
        Source depth (m).

    Returns
    -------
    heights : array (S,), scale : float
        Source heights (m) and the kernel scale (the depth, or the plane's depth below the
        median data height), which makes the coefficients carry the data unit.
    """
    count = int(groups.max()) + 1 if groups.size else 0
    if depth_type == "constant":
        plane = constant_plane(u, depth, ceiling)
        return np.full(count, plane), float(np.median(u)) - plane
    import scipy.ndimage

    heights = group_median(u, groups, count) - depth
    lowest = np.full(count, np.inf)
    np.minimum.at(lowest, groups, u)
    floor = np.full(shape, np.inf)
    floor[cells] = lowest
    floor = scipy.ndimage.minimum_filter(floor, size=2 * NEAR_CELLS + 1, mode="constant", cval=np.inf)[cells]
    return capped(np.minimum(heights, floor - 0.5 * depth), ceiling), float(depth)
