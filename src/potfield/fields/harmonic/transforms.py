"""Wavenumber-domain transforms of potential-field grids: continuation, derivatives, gradients,
tilt and reduction to the pole.

Every function takes a grid (:class:`xarray.DataArray` with dimensions ``("northing",
"easting")``, regular spacing, NaN in masked cells; see :mod:`potfield.io.grids`) and returns a
new grid with ``units``, ``long_name`` and ``history`` attributes, masked like the input and in the
input's coordinate order. Internally the grid is sorted ascending (an FFT of a grid whose
northing descends flips the result north-south), masked cells are filled (from a ``filler`` grid,
e.g. an equivalent-source prediction, else by a smooth fill), a least-squares plane is removed,
the grid is padded (reflect or edge, at least 25 % per side) with a cosine taper, transformed,
and cut back.

Conventions: wavenumbers ``k_e = 2 pi f_e``, ``k_n = 2 pi f_n`` (rad/m), ``|k| = sqrt(k_e^2 +
k_n^2)``; the vertical derivative is taken with **z positive down** (the convention of Blakely
1995, ch. 12): ``d/dz <-> |k|``, so it is positive over a positive anomaly (this is minus
harmonica's ``derivative_upward``). Reference: Blakely, R. J. (1995), Potential Theory in Gravity
and Magnetic Applications, Cambridge University Press, chapter 12.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import scipy.fft
import xarray as xr
from scipy import ndimage

from ..errors import BadGeometry, BadParameter, NotEnoughData

if TYPE_CHECKING:
    import pyproj
    from numpy.typing import ArrayLike

#: Smallest padding per side as a fraction of the grid size (common practice: >= 25 %).
MIN_PAD_FRACTION = 0.25
#: |I| (degrees) below which method="auto" uses the equivalent-layer RTP instead of the Baranov
#: filter (potfield's choice: at 35 deg the filter's largest gain 1/sin^2 I is 3.0).
AUTO_RTP_THRESHOLD_DEG = 35.0
#: Default amplitude inclination of the pseudo-inclination filter (degrees; MacLeod et al. 1993
#: use values of this order, potfield's choice).
PSEUDO_INCLINATION_DEG = 30.0
#: Reduction-to-pole methods of :func:`reduction_to_pole`.
RTP_METHODS = ("auto", "plain", "pseudo", "filter", "sources")
#: Noise-to-signal level of the regularised ("filter") RTP: the filter is
#: conj(T) / (|T|^2 + level^2) with |T| in [sin^2 I, 1] (potfield's choice: 0.1 keeps the
#: largest gain at 5, and leaves wavenumbers with |T| > 0.3 within 10 % of the Baranov filter).
WIENER_LEVEL = 0.1

PAD_MODES = ("reflect", "edge")


# --------------------------------------------------------------------------------------------
# Preparation: ascending order, fill, detrend, pad, taper
# --------------------------------------------------------------------------------------------
@dataclass
class PaddedGrid:
    """A grid made ready for an FFT, and what is needed to undo the preparation.

    Attributes
    ----------
    padded : numpy.ndarray
        Filled, detrended, padded and tapered values, shape ``(ny_p, nx_p)``, ascending
        northing (rows) and easting (columns).
    inner : tuple of slice
        Where the original grid sits inside ``padded``.
    filled : numpy.ndarray
        The original values (ascending order) with masked cells filled, before detrending.
    mask : numpy.ndarray of bool
        True where the input grid was NaN (ascending order).
    plane : numpy.ndarray
        The plane removed, evaluated on the original cells.
    slope : tuple of float
        ``(d plane / d easting, d plane / d northing)`` in units per metre.
    spacing : tuple of float
        ``(d_northing, d_easting)`` in metres (positive).
    flipped : tuple of bool
        Whether northing / easting were descending in the input.
    notes : list of str
        What was done (fill method, padding, detrend), for the output's history.
    """

    padded: np.ndarray
    inner: tuple[slice, slice]
    filled: np.ndarray
    mask: np.ndarray
    plane: np.ndarray
    slope: tuple[float, float]
    spacing: tuple[float, float]
    flipped: tuple[bool, bool]
    notes: list[str] = field(default_factory=list)

    def unpad(self, values: np.ndarray) -> np.ndarray:
        """The part of a padded-size array that covers the original grid."""
        return values[self.inner]

    def wavenumbers(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Wavenumbers of the real FFT of :attr:`padded` (rad/m).

        Returns
        -------
        k_e, k_n : numpy.ndarray
            Easting (shape ``(1, nx_p // 2 + 1)``) and northing (``(ny_p, 1)``) wavenumbers,
            with the Nyquist bin of an even-length axis set to zero so that odd kernels
            (``i k``) stay Hermitian and give real results.
        k : numpy.ndarray
            ``|k|`` on the full ``(ny_p, nx_p // 2 + 1)`` spectrum (true Nyquist values).
        """
        ny, nx = self.padded.shape
        d_n, d_e = self.spacing
        k_n = 2 * np.pi * scipy.fft.fftfreq(ny, d_n)
        k_e = 2 * np.pi * scipy.fft.rfftfreq(nx, d_e)
        k = np.hypot(k_e[None, :], k_n[:, None])
        k_n_odd, k_e_odd = k_n.copy(), k_e.copy()
        if ny % 2 == 0:
            k_n_odd[ny // 2] = 0.0
        if nx % 2 == 0:
            k_e_odd[-1] = 0.0
        return k_e_odd[None, :], k_n_odd[:, None], k


def _check_grid(grid: xr.DataArray, name: str = "grid") -> None:
    if not isinstance(grid, xr.DataArray) or set(grid.dims) != {"northing", "easting"}:
        dims = getattr(grid, "dims", None)
        raise BadGeometry(
            f"{name} must be an xarray DataArray with dimensions ('northing', 'easting'), got {dims}",
            hint="build grids with potfield.io.grids.make_grid",
        )
    for dim in ("northing", "easting"):
        coord = np.asarray(grid[dim].values, dtype=float)
        if coord.size < 4:
            raise NotEnoughData(
                f"{name} has only {coord.size} cells along {dim}; transforms need at least 4",
                hint="grid a larger area or use a smaller cell size",
            )
        step = np.diff(coord)
        if not np.allclose(step, step[0], rtol=1e-6, atol=0.0) or step[0] == 0:
            raise BadGeometry(
                f"{name} spacing along {dim} is not regular",
                hint="regrid onto a regular grid (potfield.io.grids.make_grid) before transforming",
            )


def _ascending(grid: xr.DataArray) -> tuple[xr.DataArray, tuple[bool, bool]]:
    grid = grid.transpose("northing", "easting")
    flipped = []
    for dim in ("northing", "easting"):
        desc = bool(grid[dim].values[1] < grid[dim].values[0])
        if desc:
            grid = grid.isel({dim: slice(None, None, -1)})
        flipped.append(desc)
    return grid, (flipped[0], flipped[1])


def _filler_values(
    filler: xr.DataArray | ArrayLike, grid: xr.DataArray, flipped: tuple[bool, bool]
) -> np.ndarray:
    """Filler values on the (ascending) grid's cells; an array filler is in the input grid's
    (northing, easting) order, ``flipped`` says how that order was reversed."""
    if isinstance(filler, xr.DataArray):
        _check_grid(filler, "filler grid")
        filler, _ = _ascending(filler)
        same = filler.shape == grid.shape and all(
            np.allclose(
                filler[d].values,
                grid[d].values,
                rtol=1e-9,
                atol=1e-6 * abs(float(grid[d].values[1] - grid[d].values[0])),
            )
            for d in ("northing", "easting")
        )
        if not same:
            raise BadGeometry(
                "the filler grid does not have the same cells as the grid to transform",
                hint="predict the filler (equivalent-source model) on the grid's own coordinates",
            )
        return np.asarray(filler.values, dtype=float)
    values = np.asarray(filler, dtype=float)
    if values.shape != grid.shape:
        raise BadGeometry(
            f"the filler array has shape {values.shape}, the grid {grid.shape}",
            hint="give a filler with the grid's shape",
        )
    if flipped[0]:
        values = values[::-1]
    if flipped[1]:
        values = values[:, ::-1]
    return values


def _smooth_fill(values: np.ndarray, holes: np.ndarray, passes: int = 8, sigma: float = 2.0) -> np.ndarray:
    """Fill ``holes`` with the nearest valid value, then smooth inside the holes only.

    Nearest-neighbour fill (Euclidean distance transform) followed by a few passes of a Gaussian
    filter applied to the filled cells only, so the seams between nearest-value patches are
    rounded off while the valid cells are untouched (common practice).
    """
    index = ndimage.distance_transform_edt(holes, return_distances=False, return_indices=True)
    filled = values[tuple(index)]
    # smooth only within the bounding box of the holes plus the filter's reach
    margin = int(4 * sigma) + 1
    rows, cols = np.flatnonzero(holes.any(axis=1)), np.flatnonzero(holes.any(axis=0))
    box = (
        slice(max(rows[0] - margin, 0), rows[-1] + margin + 1),
        slice(max(cols[0] - margin, 0), cols[-1] + margin + 1),
    )
    sub, sub_holes = filled[box], holes[box]
    for _ in range(passes):
        smooth = ndimage.gaussian_filter(sub, sigma=sigma, mode="nearest")
        sub[sub_holes] = smooth[sub_holes]
    return filled


def fill_masked(grid: xr.DataArray, filler: xr.DataArray | ArrayLike | None = None) -> xr.DataArray:
    """Fill the masked (NaN) cells of a grid.

    Cells are taken from ``filler`` where it is finite (e.g. an equivalent-source model
    predicted on the full grid, which is the physically consistent fill; Dampney 1969,
    Geophysics 34:39), and any cells still empty get the nearest valid value smoothed inside the
    hole (common practice).

    Parameters
    ----------
    grid : xarray.DataArray
        Grid with dims ``("northing", "easting")``; NaN marks masked cells.
    filler : xarray.DataArray or numpy.ndarray, optional
        Values on the same cells (an array: ``(northing, easting)`` in the grid's order).

    Returns
    -------
    xarray.DataArray
        The filled grid (same coordinate order as ``grid``), attribute ``fill`` says how.
    """
    _check_grid(grid)
    asc, flipped = _ascending(grid)
    values, mask, how = _fill_values(asc, filler, flipped)
    out = asc.copy(data=values)
    out.attrs = dict(grid.attrs, fill=how)
    return _reorient(out, flipped)


def _fill_values(
    asc: xr.DataArray, filler: xr.DataArray | ArrayLike | None, flipped: tuple[bool, bool]
) -> tuple[np.ndarray, np.ndarray, str]:
    values = np.array(asc.values, dtype=float)
    mask = ~np.isfinite(values)
    if mask.all():
        raise NotEnoughData(
            f"grid '{asc.name}' has no valid (finite) cell",
        )
    how = "none"
    if mask.any():
        holes = mask.copy()
        if filler is not None:
            fill = _filler_values(filler, asc, flipped)
            take = holes & np.isfinite(fill)
            values[take] = fill[take]
            holes &= ~take
            how = "filler"
        if holes.any():
            values = _smooth_fill(values, holes)
            how = "filler + smooth fill" if how == "filler" else "smooth fill"
    return values, mask, how


def pad_grid(
    grid: xr.DataArray,
    pad_fraction: float = 0.5,
    mode: str = "reflect",
    taper: bool = True,
    detrend: bool = True,
    filler: xr.DataArray | ArrayLike | None = None,
) -> PaddedGrid:
    """Prepare a grid for a wavenumber-domain filter.

    Steps: sort both coordinates ascending; fill masked cells (:func:`fill_masked`); remove the
    least-squares plane fitted to the filled grid; pad each side by ``pad_fraction`` of the grid
    size (then up to a fast FFT length) by mirror reflection or by repeating the edge value;
    taper the padding with a cosine (half Hann) ramp from 1 at the data edge to 0 at the outer
    edge. Padding, detrending and tapering suppress the wrap-around and edge (Gibbs) effects of
    the discrete Fourier transform (Blakely 1995, Potential Theory in Gravity and Magnetic
    Applications, CUP, ch. 12; common practice: pad >= 25 % per side).

    Parameters
    ----------
    grid : xarray.DataArray
        Dims ``("northing", "easting")``, regular spacing, NaN = masked.
    pad_fraction : float
        Padding per side as a fraction of the number of cells along that axis (>= 0.25).
    mode : {"reflect", "edge"}
        Mirror the grid about its edges, or repeat the edge values.
    taper : bool
        Apply the cosine taper to the padding.
    detrend : bool
        Remove a least-squares plane before padding.
    filler : xarray.DataArray or numpy.ndarray, optional
        Values for masked cells (e.g. equivalent-source prediction).

    Returns
    -------
    PaddedGrid
    """
    _check_grid(grid)
    if not pad_fraction >= MIN_PAD_FRACTION:
        raise BadParameter(
            f"pad_fraction {pad_fraction} is below the minimum {MIN_PAD_FRACTION}",
            hint=f"use a value >= {MIN_PAD_FRACTION} (0.5 is the default)",
        )
    if mode not in PAD_MODES:
        raise BadParameter(f"unknown padding mode '{mode}'", hint=f"use one of {', '.join(PAD_MODES)}")
    asc, flipped = _ascending(grid)
    values, mask, how = _fill_values(asc, filler, flipped)
    northing = np.asarray(asc.northing.values, dtype=float)
    easting = np.asarray(asc.easting.values, dtype=float)
    spacing = (float(northing[1] - northing[0]), float(easting[1] - easting[0]))
    notes = []
    if how != "none":
        notes.append(f"masked cells filled ({how})")

    plane = np.zeros_like(values)
    slope = (0.0, 0.0)
    if detrend:
        e0, n0 = easting.mean(), northing.mean()
        ee, nn = np.meshgrid(easting - e0, northing - n0)
        # fitted to the filled grid (every cell), so a perfect filler reproduces the result of
        # the complete grid
        # normal equations of the 3-parameter fit (coordinates centred, so well conditioned)
        basis = (np.ones_like(ee), ee, nn)
        normal = np.array([[np.vdot(a, b) for b in basis] for a in basis])
        coef = np.linalg.solve(normal, np.array([np.vdot(a, values) for a in basis]))
        plane = coef[0] + coef[1] * ee + coef[2] * nn
        slope = (float(coef[1]), float(coef[2]))
        notes.append("plane removed")

    ny, nx = values.shape
    pads = []
    for n in (ny, nx):
        side = int(math.ceil(pad_fraction * n))
        total = scipy.fft.next_fast_len(n + 2 * side, real=True)
        pads.append((side, total - n - side))
    padded = np.pad(values - plane, pads, mode="reflect" if mode == "reflect" else "edge")
    if taper:
        weights = [_taper(n, before, after) for n, (before, after) in zip((ny, nx), pads)]
        padded *= weights[0][:, None] * weights[1][None, :]
    notes.append(f"padded {pad_fraction:.0%} per side ({mode}{' + cosine taper' if taper else ''})")
    inner = (slice(pads[0][0], pads[0][0] + ny), slice(pads[1][0], pads[1][0] + nx))
    return PaddedGrid(
        padded=padded,
        inner=inner,
        filled=values,
        mask=mask,
        plane=plane,
        slope=slope,
        spacing=spacing,
        flipped=flipped,
        notes=notes,
    )


def _taper(n: int, before: int, after: int) -> np.ndarray:
    """1 over the data, a cosine ramp to 0 across each padding (half Hann window)."""
    weight = np.ones(n + before + after)
    if before:
        d = np.arange(before, 0, -1)  # distance (cells) from the data edge
        weight[:before] = 0.5 * (1 + np.cos(np.pi * d / (before + 1)))
    if after:
        d = np.arange(1, after + 1)
        weight[n + before :] = 0.5 * (1 + np.cos(np.pi * d / (after + 1)))
    return weight


# --------------------------------------------------------------------------------------------
# Core
# --------------------------------------------------------------------------------------------
def _reorient(grid: xr.DataArray, flipped: tuple[bool, bool]) -> xr.DataArray:
    if flipped[0]:
        grid = grid.isel(northing=slice(None, None, -1))
    if flipped[1]:
        grid = grid.isel(easting=slice(None, None, -1))
    return grid


def _apply_kernel(prep: PaddedGrid, kernel: Callable) -> np.ndarray:
    """Multiply the spectrum of ``prep.padded`` by ``kernel(k_e, k_n, k)``; the unpadded result."""
    spectrum = scipy.fft.rfft2(prep.padded)
    k_e, k_n, k = prep.wavenumbers()
    with np.errstate(divide="ignore", invalid="ignore"):
        filt = kernel(k_e, k_n, k)
    filt = np.where(np.isfinite(filt), filt, 0.0)
    result = scipy.fft.irfft2(spectrum * filt, s=prep.padded.shape)
    return prep.unpad(result)


def _finish(
    grid: xr.DataArray,
    prep: PaddedGrid,
    values: np.ndarray,
    *,
    suffix: str,
    units: str,
    long_name: str,
    step: str,
    **attrs: object,
) -> xr.DataArray:
    asc, _ = _ascending(grid)
    values = np.where(prep.mask, np.nan, values)
    name = f"{grid.name}_{suffix}" if grid.name else suffix
    out = xr.DataArray(
        values,
        coords={"northing": asc.northing.values, "easting": asc.easting.values},
        dims=("northing", "easting"),
        name=name,
    )
    for coord in asc.coords:  # keep non-dimension coordinates (e.g. a 2-D height)
        if coord not in ("northing", "easting") and set(asc[coord].dims) <= {"northing", "easting"}:
            out = out.assign_coords({coord: asc[coord]})
    previous = grid.attrs.get("history", "")
    detail = f"{step} [{'; '.join(prep.notes)}]"
    out.attrs = {
        "units": units,
        "long_name": long_name,
        "history": f"{previous}; {detail}" if previous else detail,
        **{k: v for k, v in attrs.items() if v is not None},
    }
    return _reorient(out, prep.flipped)


def _source(grid: xr.DataArray) -> tuple[str, str]:
    return grid.attrs.get("units", ""), grid.attrs.get("long_name", grid.name or "field")


def _per_metre(units: str, order: int) -> str:
    if not units:
        return f"m-{order}" if order > 1 else "m-1"
    return f"{units}/m" if order == 1 else f"{units}/m^{order}"


# --------------------------------------------------------------------------------------------
# Continuation
# --------------------------------------------------------------------------------------------
def upward_continuation(
    grid: xr.DataArray,
    height: float,
    *,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
) -> xr.DataArray:
    """Continue a grid upward by ``height`` metres.

    The spectrum is multiplied by ``exp(-|k| height)`` (Blakely 1995, Potential Theory in Gravity
    and Magnetic Applications, CUP, ch. 12). The plane removed before the transform is added
    back unchanged (a linear function is harmonic and continues as itself).

    Parameters
    ----------
    grid : xarray.DataArray
        Dims ``("northing", "easting")``, regular spacing, NaN = masked.
    height : float
        Continuation distance (m, >= 0).
    pad_fraction, pad_mode, filler
        See :func:`pad_grid`.

    Returns
    -------
    xarray.DataArray
        Same units as ``grid``.
    """
    _check_grid(grid)
    if not (np.isfinite(height) and height >= 0):
        raise BadParameter(
            f"upward continuation height {height} m must be >= 0",
            hint="give a positive height; use downward_continuation to go down",
        )
    prep = pad_grid(grid, pad_fraction, pad_mode, filler=filler)
    values = _apply_kernel(prep, lambda ke, kn, k: np.exp(-k * height)) + prep.plane
    units, long_name = _source(grid)
    out = _finish(
        grid,
        prep,
        values,
        suffix="upward",
        units=units,
        long_name=f"{long_name} continued upward by {height:g} m",
        step=f"upward continuation by {height:g} m (Blakely 1995 ch. 12)",
        continuation_m=float(height),
    )
    return _shift_height(out, height)


def _shift_height(grid: xr.DataArray, change: float) -> xr.DataArray:
    """Raise an ``upward`` (height) coordinate, if the grid has one, by ``change`` metres."""
    if "upward" in grid.coords:
        grid = grid.assign_coords(upward=grid["upward"] + change)
    return grid


def _tikhonov_gain(k: np.ndarray, depth: float, alpha: float) -> np.ndarray:
    return np.exp(k * depth) / (1.0 + alpha * k**2 * np.exp(2 * k * depth))


def _choose_regularisation(k_max: float, depth: float, max_gain: float) -> float:
    """Smallest alpha (m^2) for which the Tikhonov downward-continuation gain stays <= max_gain."""
    k = np.linspace(0.0, k_max, 4097)
    if np.exp(k_max * depth) <= max_gain:
        return 0.0
    lo, hi = -30.0, 30.0  # log10 alpha; the peak gain decreases monotonically with alpha
    for _ in range(80):
        mid = 0.5 * (lo + hi)
        if _tikhonov_gain(k, depth, 10.0**mid).max() > max_gain:
            lo = mid
        else:
            hi = mid
    return float(10.0**hi)


def downward_continuation(
    grid: xr.DataArray,
    depth: float,
    regularisation: float | None = None,
    *,
    source_depth: float | None = None,
    max_gain: float = 100.0,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
) -> xr.DataArray:
    """Continue a grid downward by ``depth`` metres, stabilised by Tikhonov regularisation.

    Downward continuation multiplies the spectrum by ``exp(+|k| depth)``, which amplifies noise
    without bound (Blakely 1995, Potential Theory in Gravity and Magnetic Applications, CUP,
    ch. 12). The Tikhonov-regularised inverse of the upward-continuation operator
    ``A = exp(-|k| depth)`` with a gradient (``|k|^2``) stabiliser is

    ``L(k) = A / (A^2 + alpha |k|^2) = exp(|k| d) / (1 + alpha |k|^2 exp(2 |k| d))``

    (Tikhonov and Arsenin 1977, Solutions of Ill-Posed Problems, Winston): it follows the exact
    filter at long wavelengths and rolls off at short ones.

    Parameters
    ----------
    grid : xarray.DataArray
        Dims ``("northing", "easting")``, regular spacing, NaN = masked.
    depth : float
        Continuation distance downward (m, >= 0).
    regularisation : float, optional
        ``alpha`` in m^2. None: the smallest alpha whose peak gain is ``max_gain``.
    source_depth : float, optional
        Depth (m, below the grid surface) of the shallowest sources, when known. Continuing to
        within 20 % of it (or beyond) issues a :class:`UserWarning` and a ``warning`` attribute:
        the field is not harmonic below the sources.
    max_gain : float
        Peak amplification allowed when ``regularisation`` is None.
    pad_fraction, pad_mode, filler
        See :func:`pad_grid`.

    Returns
    -------
    xarray.DataArray
        Same units as ``grid``; attributes ``regularisation_m2`` and ``peak_gain``.
    """
    _check_grid(grid)
    if not (np.isfinite(depth) and depth >= 0):
        raise BadParameter(
            f"downward continuation depth {depth} m must be >= 0",
            hint="give a positive depth; use upward_continuation to go up",
        )
    warning = None
    if source_depth is not None and depth >= 0.8 * source_depth:
        warning = (
            f"downward continuation by {depth:g} m approaches or passes the source depth "
            f"{source_depth:g} m: the result is unstable and not a valid field there"
        )
        warnings.warn(warning, UserWarning, stacklevel=2)
    prep = pad_grid(grid, pad_fraction, pad_mode, filler=filler)
    _, _, k = prep.wavenumbers()
    if regularisation is None:
        alpha = _choose_regularisation(float(k.max()), depth, max_gain)
    else:
        if not (np.isfinite(regularisation) and regularisation >= 0):
            raise BadParameter(
                f"regularisation {regularisation} must be >= 0 (m^2)",
                hint="give a non-negative alpha or None for the automatic choice",
            )
        alpha = float(regularisation)
    peak = float(_tikhonov_gain(np.linspace(0, float(k.max()), 4097), depth, alpha).max())
    values = _apply_kernel(prep, lambda ke, kn, kk: _tikhonov_gain(kk, depth, alpha)) + prep.plane
    units, long_name = _source(grid)
    return _shift_height(
        _finish(
            grid,
            prep,
            values,
            suffix="downward",
            units=units,
            long_name=f"{long_name} continued downward by {depth:g} m",
            step=(
                f"downward continuation by {depth:g} m, Tikhonov alpha {alpha:.3g} m^2, "
                f"peak gain {peak:.3g} (Tikhonov and Arsenin 1977; Blakely 1995 ch. 12)"
            ),
            continuation_m=-float(depth),
            regularisation_m2=alpha,
            peak_gain=peak,
            warning=warning,
        ),
        -float(depth),
    )


def model_upward_continuation(
    predict: Callable, grid: xr.DataArray, height: float, grid_height: ArrayLike
) -> xr.DataArray:
    """Upward continuation by evaluating a source model at the higher surface.

    An equivalent-source layer reproduces the field it was fitted to and is harmonic above the
    sources, so predicting it at ``grid_height + height`` continues the field exactly for that
    model, without the edge effects of the FFT (Dampney 1969, Geophysics 34:39; Cordell 1992,
    Geophysics 57:629).

    Parameters
    ----------
    predict : callable
        ``predict((easting, northing, upward)) -> values`` on arrays of equal shape (e.g. the
        ``predict`` method of an equivalent-source model).
    grid : xarray.DataArray
        The grid whose cells (and mask) to use.
    height : float
        Continuation distance (m, >= 0).
    grid_height : float or array
        Height (m) of the grid surface (scalar, or an array of the grid's shape).

    Returns
    -------
    xarray.DataArray
        Masked like ``grid``.
    """
    _check_grid(grid)
    if not (np.isfinite(height) and height >= 0):
        raise BadParameter(
            f"upward continuation height {height} m must be >= 0", hint="give a positive height"
        )
    grid = grid.transpose("northing", "easting")
    easting, northing = np.meshgrid(grid.easting.values, grid.northing.values)
    upward = np.broadcast_to(np.asarray(grid_height, dtype=float), easting.shape) + height
    values = np.asarray(predict((easting, northing, upward)), dtype=float).reshape(easting.shape)
    values = np.where(np.isfinite(grid.values), values, np.nan)
    units, long_name = _source(grid)
    previous = grid.attrs.get("history", "")
    step = f"upward continuation by {height:g} m by source-model prediction (Dampney 1969)"
    out = grid.copy(data=values)
    out.name = f"{grid.name}_upward_model" if grid.name else "upward_model"
    out.attrs = {
        "units": units,
        "long_name": f"{long_name} continued upward by {height:g} m (source model)",
        "history": f"{previous}; {step}" if previous else step,
        "continuation_m": float(height),
    }
    return _shift_height(out, height)


# --------------------------------------------------------------------------------------------
# Derivatives
# --------------------------------------------------------------------------------------------
def vertical_derivative(
    grid: xr.DataArray,
    order: int = 1,
    *,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
) -> xr.DataArray:
    """Vertical derivative of order 1 or 2, z positive down.

    The spectrum is multiplied by ``|k|^order`` (Blakely 1995, Potential Theory in Gravity and
    Magnetic Applications, CUP, ch. 12), which is the derivative with respect to depth: it is
    positive above a positive source. The removed plane is not restored (its vertical
    derivative is taken as zero).

    Parameters
    ----------
    grid : xarray.DataArray
        Dims ``("northing", "easting")``, regular spacing, NaN = masked.
    order : {1, 2}
    pad_fraction, pad_mode, filler
        See :func:`pad_grid`.

    Returns
    -------
    xarray.DataArray
        Units of ``grid`` per metre (per metre squared for order 2).
    """
    _check_grid(grid)
    if order not in (1, 2):
        raise BadParameter(f"vertical derivative order {order} is not supported", hint="use order 1 or 2")
    prep = pad_grid(grid, pad_fraction, pad_mode, filler=filler)
    values = _apply_kernel(prep, lambda ke, kn, k: k**order)
    units, long_name = _source(grid)
    label = "first" if order == 1 else "second"
    return _finish(
        grid,
        prep,
        values,
        suffix=f"dz{order}",
        units=_per_metre(units, order),
        long_name=f"{label} vertical derivative of {long_name} (z down)",
        step=f"vertical derivative order {order}, |k|^{order} (Blakely 1995 ch. 12)",
        positive="down",
    )


def _horizontal(
    grid: xr.DataArray,
    method: str,
    pad_fraction: float,
    pad_mode: str,
    filler: xr.DataArray | ArrayLike | None,
) -> tuple[np.ndarray, np.ndarray, PaddedGrid]:
    """(dx, dy, prep) on the ascending grid: d/d easting, d/d northing."""
    if method not in ("central", "fft"):
        raise BadParameter(f"unknown horizontal derivative method '{method}'", hint="use 'central' or 'fft'")
    prep = pad_grid(grid, pad_fraction, pad_mode, filler=filler)
    if method == "central":
        d_n, d_e = prep.spacing
        dy = _central_difference(prep.filled, d_n, axis=0)
        dx = _central_difference(prep.filled, d_e, axis=1)
    else:
        dx = _apply_kernel(prep, lambda ke, kn, k: 1j * ke) + prep.slope[0]
        dy = _apply_kernel(prep, lambda ke, kn, k: 1j * kn) + prep.slope[1]
    return dx, dy, prep


def _central_difference(values: np.ndarray, step: float, axis: int) -> np.ndarray:
    """Fourth-order central differences ``(f[-2] - 8 f[-1] + 8 f[1] - f[2]) / (12 h)``, second
    order (``numpy.gradient``) in the two cells next to each edge (five-point stencil;
    Abramowitz and Stegun 1964, Handbook of Mathematical Functions, ch. 25)."""
    out = np.gradient(values, step, axis=axis, edge_order=2)
    v = np.moveaxis(values, axis, 0)
    o = np.moveaxis(out, axis, 0)
    if v.shape[0] >= 5:
        o[2:-2] = (v[:-4] - 8.0 * v[1:-3] + 8.0 * v[3:-1] - v[4:]) / (12.0 * step)
    return out


_METHOD_TEXT = {
    "central": "central differences (fourth order)",
    "fft": "wavenumber domain, i k (Blakely 1995 ch. 12)",
}


def horizontal_derivatives(
    grid: xr.DataArray,
    method: str = "central",
    *,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
) -> tuple[xr.DataArray, xr.DataArray]:
    """Derivatives along easting (dx) and northing (dy).

    ``method="central"``: fourth-order central differences (second order next to the edges;
    Abramowitz and Stegun 1964, Handbook of Mathematical Functions, ch. 25) on the filled
    grid, exact for a plane and free of FFT edge effects (common practice).
    ``method="fft"``: multiply the spectrum by ``i k_e`` / ``i k_n`` (Blakely 1995, Potential
    Theory in Gravity and Magnetic Applications, CUP, ch. 12), plane slope restored.

    Parameters
    ----------
    grid : xarray.DataArray
        Dims ``("northing", "easting")``, regular spacing, NaN = masked.
    method : {"central", "fft"}
    pad_fraction, pad_mode, filler
        See :func:`pad_grid`.

    Returns
    -------
    dx, dy : xarray.DataArray
        Units of ``grid`` per metre.
    """
    _check_grid(grid)
    dx, dy, prep = _horizontal(grid, method, pad_fraction, pad_mode, filler)
    units, long_name = _source(grid)
    common = dict(units=_per_metre(units, 1))
    out_dx = _finish(
        grid,
        prep,
        dx,
        suffix="dx",
        long_name=f"easting derivative of {long_name}",
        step=f"easting derivative, {_METHOD_TEXT[method]}",
        **common,
    )
    out_dy = _finish(
        grid,
        prep,
        dy,
        suffix="dy",
        long_name=f"northing derivative of {long_name}",
        step=f"northing derivative, {_METHOD_TEXT[method]}",
        **common,
    )
    return out_dx, out_dy


def _gradients(grid, method, pad_fraction, pad_mode, filler):
    dx, dy, prep = _horizontal(grid, method, pad_fraction, pad_mode, filler)
    dz = _apply_kernel(prep, lambda ke, kn, k: k)
    return dx, dy, dz, prep


def total_horizontal_gradient(
    grid: xr.DataArray,
    method: str = "central",
    *,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
) -> xr.DataArray:
    """Total horizontal gradient ``sqrt(dx^2 + dy^2)``.

    Its maxima lie over steep contacts of the reduced-to-pole magnetic or gravity field
    (Cordell and Grauch 1985, in The Utility of Regional Gravity and Magnetic Anomaly Maps, SEG,
    181-197; Blakely and Simpson 1986, Geophysics 51:1494).

    Parameters
    ----------
    grid : xarray.DataArray
    method : {"central", "fft"}
        How the horizontal derivatives are taken (:func:`horizontal_derivatives`).
    pad_fraction, pad_mode, filler
        See :func:`pad_grid`.

    Returns
    -------
    xarray.DataArray
        Units of ``grid`` per metre.
    """
    _check_grid(grid)
    dx, dy, prep = _horizontal(grid, method, pad_fraction, pad_mode, filler)
    units, long_name = _source(grid)
    return _finish(
        grid,
        prep,
        np.hypot(dx, dy),
        suffix="thg",
        units=_per_metre(units, 1),
        long_name=f"total horizontal gradient of {long_name}",
        step=f"total horizontal gradient, {_METHOD_TEXT[method]} (Cordell and Grauch 1985)",
    )


def total_gradient_amplitude(
    grid: xr.DataArray,
    method: str = "central",
    *,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
) -> xr.DataArray:
    """Total gradient amplitude (3-D analytic signal amplitude) ``sqrt(dx^2 + dy^2 + dz^2)``.

    For a 2-D contact it is a bell ``alpha / sqrt(h^2 + x^2)`` centred over the contact whatever
    the magnetisation direction (Nabighian 1972, Geophysics 37:507); in 3-D its maxima mark
    source edges (Roest, Verhoef and Pilkington 1992, Geophysics 57:116).

    Parameters
    ----------
    grid : xarray.DataArray
    method : {"central", "fft"}
        How the horizontal derivatives are taken; the vertical one is always ``|k|``.
    pad_fraction, pad_mode, filler
        See :func:`pad_grid`.

    Returns
    -------
    xarray.DataArray
        Units of ``grid`` per metre.
    """
    _check_grid(grid)
    dx, dy, dz, prep = _gradients(grid, method, pad_fraction, pad_mode, filler)
    units, long_name = _source(grid)
    return _finish(
        grid,
        prep,
        np.sqrt(dx**2 + dy**2 + dz**2),
        suffix="tga",
        units=_per_metre(units, 1),
        long_name=f"total gradient amplitude (analytic signal) of {long_name}",
        step=(
            f"total gradient amplitude, horizontal {_METHOD_TEXT[method]}, vertical |k| "
            "(Nabighian 1972; Roest et al. 1992)"
        ),
    )


def tilt_angle(
    grid: xr.DataArray,
    method: str = "central",
    *,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
) -> xr.DataArray:
    """Tilt angle ``atan(dz / sqrt(dx^2 + dy^2))`` in degrees, within [-90, 90].

    Positive over the source, zero near its edges, negative outside (Miller and Singh 1994,
    J. Appl. Geophys. 32:213). For a vertical 2-D contact at depth ``h`` in a vertical field it
    equals ``atan(x / h)`` (Salem et al. 2007, The Leading Edge 26:1502). z is positive down.

    Parameters
    ----------
    grid : xarray.DataArray
    method : {"central", "fft"}
        How the horizontal derivatives are taken.
    pad_fraction, pad_mode, filler
        See :func:`pad_grid`.

    Returns
    -------
    xarray.DataArray
        Degrees.
    """
    _check_grid(grid)
    dx, dy, dz, prep = _gradients(grid, method, pad_fraction, pad_mode, filler)
    tilt = np.degrees(np.arctan2(dz, np.hypot(dx, dy)))
    _, long_name = _source(grid)
    return _finish(
        grid,
        prep,
        tilt,
        suffix="tilt",
        units="degree",
        long_name=f"tilt angle of {long_name}",
        step=f"tilt angle, horizontal {_METHOD_TEXT[method]}, vertical |k| (Miller and Singh 1994)",
        valid_min=-90.0,
        valid_max=90.0,
    )


# --------------------------------------------------------------------------------------------
# Reduction to the pole
# --------------------------------------------------------------------------------------------
def _unit(inclination: float, declination: float) -> tuple[float, float, float]:
    """(east, north, down) components of a unit vector at inclination / declination (degrees)."""
    inc, dec = np.radians(inclination), np.radians(declination)
    return np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), np.sin(inc)


def _theta(inclination, declination, ke, kn, k):
    """Baranov's Theta = u_z + i (u_e k_e + u_n k_n) / |k| (z down; Blakely 1995 ch. 12)."""
    ue, un, uz = _unit(inclination, declination)
    return uz + 1j * (ue * ke + un * kn) / k


def grid_declination(
    declination: float, crs: str | pyproj.CRS, longitude: float, latitude: float
) -> tuple[float, float]:
    """Declination measured from grid north of a projected CRS instead of true north.

    Grid north differs from true north by the meridian convergence (about
    ``(lambda - lambda_0) sin phi`` for transverse Mercator; Snyder 1987, Map Projections: A
    Working Manual, USGS Professional Paper 1395). The direction of true north in the grid is
    found numerically by projecting a short step along the meridian with pyproj, so any CRS
    works. Filters built on the grid's axes (reduction to the pole) need the grid declination.

    Parameters
    ----------
    declination : float
        Declination east of true north (degrees).
    crs : str or pyproj.CRS
        The grid's CRS.
    longitude, latitude : float
        Where (degrees), e.g. the survey centroid.

    Returns
    -------
    grid_declination, true_north : float
        Declination east of grid north, and the azimuth of true north east of grid north
        (degrees): ``grid_declination = declination + true_north``.
    """
    import pyproj

    try:
        to_grid = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    except pyproj.exceptions.CRSError as err:
        raise BadGeometry(
            f"cannot use the grid CRS for the grid declination ({err})",
            hint="give a CRS that pyproj understands",
        ) from None
    step = 1e-4 if latitude < 89.0 else -1e-4
    e0, n0 = to_grid.transform(longitude, latitude)
    e1, n1 = to_grid.transform(longitude, latitude + step)
    true_north = float(np.degrees(np.arctan2(np.sign(step) * (e1 - e0), np.sign(step) * (n1 - n0))))
    if not np.isfinite(true_north):
        raise BadGeometry(
            f"the grid CRS cannot project the point ({longitude}, {latitude})",
            hint="the point must lie inside the CRS's area of use",
        )
    return float(declination) + true_north, true_north


def rtp_method_for(
    inclination: float, threshold: float = AUTO_RTP_THRESHOLD_DEG, low: str = "sources"
) -> str:
    """``"plain"`` when ``|inclination| >= threshold`` degrees, else ``low`` (default the
    equivalent-layer RTP, :mod:`potfield.fields.harmonic.rtp_layer`)."""
    return "plain" if abs(float(inclination)) >= threshold else low


def default_pseudo_inclination(inclination: float, threshold: float = PSEUDO_INCLINATION_DEG) -> float:
    """Amplitude inclination used by the pseudo-inclination RTP when none is given.

    ``threshold`` degrees (default 30) with the sign of ``inclination`` (or the inclination
    itself when it is steeper): potfield's choice, so the filter equals the plain one at and
    above ``threshold``.
    """
    inc = float(inclination)
    return math.copysign(max(abs(inc), threshold), inc if inc != 0 else 1.0)


def reduction_to_pole(
    grid: xr.DataArray,
    inclination: float,
    declination: float,
    mag_inclination: float | None = None,
    mag_declination: float | None = None,
    method: str = "plain",
    pseudo_inclination: float | None = None,
    *,
    auto_threshold: float = AUTO_RTP_THRESHOLD_DEG,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
    filler: xr.DataArray | ArrayLike | None = None,
    wiener_level: float = WIENER_LEVEL,
    layer_depth: float | None = None,
    layer_damping: float | None = None,
) -> xr.DataArray:
    """Reduce a total-field anomaly grid to the magnetic pole.

    ``method="plain"``: Baranov's filter ``1 / (Theta_m Theta_f)`` with
    ``Theta = u_z + i (u_e k_e + u_n k_n) / |k|`` for the unit vectors of the magnetisation (m)
    and of the ambient field (f), z down (Baranov 1957, Geophysics 22:359; Baranov and Naudy
    1964, Geophysics 29:67; Blakely 1995, Potential Theory in Gravity and Magnetic
    Applications, CUP, ch. 12). At low |I| the amplitude ``1/|Theta|^2`` approaches
    ``1/sin^2 I`` for wavenumbers perpendicular to the declination and the result is striped.

    ``method="pseudo"``: the pseudo-inclination filter of MacLeod, Jones and Dai (1993),
    Explor. Geophys. 24:679: the phase of the plain filter (true inclinations) with the
    amplitude ``1 / (|Theta_m'| |Theta_f'|)`` computed at a steeper "amplitude" inclination
    ``I'`` (``pseudo_inclination``; the larger of it and the true |I|, with the true sign). For
    induced magnetisation this is MacLeod et al.'s
    ``[sin I - i cos I cos(D - t)]^2 / ([sin^2 I' + cos^2 I' cos^2(D - t)][sin^2 I + cos^2 I cos^2(D - t)])``.

    ``method="filter"``: a regularised inverse of the Baranov filter,
    ``conj(T) / (|T|^2 + wiener_level^2)`` with ``T = Theta_m Theta_f``: the least-squares
    (Wiener) inverse for a white noise-to-signal ratio ``wiener_level^2`` (Hansen and Pawlowski
    1989, Geophysics 54:1607, in its simplest form). Its gain never exceeds
    ``1 / (2 wiener_level)``.

    ``method="sources"``: an equivalent layer of dipoles magnetised along the magnetisation
    direction is fitted to the grid (damped least squares, masked cells left out) and the same
    moments, vertical, give the pole anomaly (Silva 1986, Geophysics 51:369; Li and Oldenburg
    2001, Geophysics 66:571); see :func:`potfield.fields.harmonic.rtp_layer.layer_reduction_to_pole`.
    Stable at any inclination; no plane is removed and no padding is used.

    ``method="auto"``: plain when ``min(|I|, |I_m|) >= auto_threshold`` degrees (35 by
    default), else sources.

    Parameters
    ----------
    grid : xarray.DataArray
        Total-field anomaly (nT), dims ``("northing", "easting")``, NaN = masked.
    inclination, declination : float
        Ambient field direction (degrees; inclination positive down, declination east of grid
        north).
    mag_inclination, mag_declination : float, optional
        Magnetisation direction (both or neither); default: along the ambient field (induced).
    method : {"plain", "pseudo", "filter", "sources", "auto"}
    pseudo_inclination : float, optional
        Amplitude inclination ``I'`` in degrees (magnitude used); default
        :func:`default_pseudo_inclination`.
    auto_threshold : float
        Switch of ``method="auto"`` (degrees).
    pad_fraction, pad_mode, filler
        See :func:`pad_grid` (not used by ``method="sources"``, which leaves masked cells out
        of its fit).
    wiener_level : float
        Noise-to-signal level of ``method="filter"`` (> 0).
    layer_depth, layer_damping : float, optional
        Depth (m) and relative damping of the ``sources`` layer; defaults in
        :mod:`potfield.fields.harmonic.rtp_layer`.

    Returns
    -------
    xarray.DataArray
        Attributes ``rtp_method`` ("plain"/"pseudo"/"filter"/"sources"), ``inclination``,
        ``declination``, ``mag_inclination``, ``mag_declination``; for pseudo
        ``pseudo_inclination``; for filter ``wiener_level``; for sources ``layer_depth``,
        ``layer_damping``, ``layer_iterations`` and ``layer_residual_rms`` (field units).

    References
    ----------
    Baranov (1957); Blakely (1995) ch. 12; MacLeod, Jones and Dai (1993); Hansen and Pawlowski
    (1989); Silva (1986); Li and Oldenburg (2001).
    """
    _check_grid(grid)
    if (mag_inclination is None) != (mag_declination is None):
        raise BadParameter(
            "give both magnetisation inclination and declination, or neither",
            hint="set both angles (degrees) or leave both out for induced magnetisation",
        )
    for label, value in (
        ("inclination", inclination),
        ("declination", declination),
        ("mag_inclination", mag_inclination),
        ("mag_declination", mag_declination),
    ):
        if value is not None and not np.isfinite(value):
            raise BadParameter(
                f"RTP {label} is not a finite number ({value})",
                hint="give the field's inclination and declination in degrees",
            )
    if abs(inclination) > 90 or (mag_inclination is not None and abs(mag_inclination) > 90):
        raise BadParameter(
            "an inclination is outside [-90, 90] degrees", hint="give inclinations in degrees, positive down"
        )
    m_inc = inclination if mag_inclination is None else float(mag_inclination)
    m_dec = declination if mag_declination is None else float(mag_declination)
    if method == "auto":
        method = rtp_method_for(min(abs(inclination), abs(m_inc)), auto_threshold)
    if method not in RTP_METHODS[1:]:
        raise BadParameter(
            f"unknown reduction-to-pole method '{method}'", hint="use one of " + ", ".join(RTP_METHODS)
        )
    if method == "sources":
        return _layer_rtp(grid, inclination, declination, m_inc, m_dec, layer_depth, layer_damping)
    extra = {}
    if method == "plain":

        def kernel(ke, kn, k):
            return 1.0 / (_theta(m_inc, m_dec, ke, kn, k) * _theta(inclination, declination, ke, kn, k))

        step = "reduction to the pole, Baranov filter 1/(Theta_m Theta_f) (Baranov 1957; Blakely 1995 ch. 12)"
    elif method == "filter":
        level = float(wiener_level)
        if not level > 0:
            raise BadParameter(f"RTP filter level {wiener_level} must be positive", hint="use e.g. 0.1")

        def kernel(ke, kn, k):
            t = _theta(m_inc, m_dec, ke, kn, k) * _theta(inclination, declination, ke, kn, k)
            return np.conj(t) / (np.abs(t) ** 2 + level**2)

        step = (
            f"reduction to the pole, regularised inverse filter conj(T)/(|T|^2 + {level:g}^2) "
            "(Hansen and Pawlowski 1989)"
        )
        extra["wiener_level"] = level
    else:
        if pseudo_inclination is None:
            pseudo = abs(default_pseudo_inclination(min(abs(inclination), abs(m_inc))))
        else:
            pseudo = abs(float(pseudo_inclination))
            if pseudo > 90:
                raise BadParameter(
                    f"pseudo inclination {pseudo_inclination} is outside [-90, 90] degrees",
                    hint="give degrees, e.g. 30",
                )
        amp_f = math.copysign(max(abs(inclination), pseudo), inclination if inclination else 1.0)
        amp_m = math.copysign(max(abs(m_inc), pseudo), m_inc if m_inc else 1.0)

        def kernel(ke, kn, k):
            true = _theta(m_inc, m_dec, ke, kn, k) * _theta(inclination, declination, ke, kn, k)
            amplitude = np.abs(_theta(amp_m, m_dec, ke, kn, k)) * np.abs(
                _theta(amp_f, declination, ke, kn, k)
            )
            return np.exp(-1j * np.angle(true)) / amplitude

        step = (
            f"reduction to the pole, pseudo-inclination filter, amplitude inclination {pseudo:g} deg "
            "(MacLeod, Jones and Dai 1993)"
        )
    prep = pad_grid(grid, pad_fraction, pad_mode, filler=filler)

    def zero_dc(ke, kn, k):
        filt = kernel(ke, kn, k)
        return np.where(k > 0, filt, 0.0)

    values = _apply_kernel(prep, zero_dc)
    units, long_name = _source(grid)
    return _finish(
        grid,
        prep,
        values,
        suffix="rtp",
        units=units,
        long_name=f"{long_name} reduced to the pole",
        step=f"{step}, I {inclination:g} D {declination:g}",
        rtp_method=method,
        inclination=float(inclination),
        declination=float(declination),
        mag_inclination=float(m_inc),
        mag_declination=float(m_dec),
        pseudo_inclination=float(pseudo) if method == "pseudo" else None,
        **extra,
    )


def _layer_rtp(
    grid: xr.DataArray,
    inclination: float,
    declination: float,
    m_inc: float,
    m_dec: float,
    depth: float | None,
    damping: float | None,
) -> xr.DataArray:
    """The ``sources`` branch of :func:`reduction_to_pole`."""
    from . import rtp_layer

    asc, flipped = _ascending(grid)
    values = np.asarray(asc.values, dtype=float)
    if not np.isfinite(values).any():
        raise NotEnoughData(
            f"grid '{asc.name}' has no valid (finite) cell",
            hint="check the gridding output and its mask distance",
        )
    spacing = (
        float(asc.northing.values[1] - asc.northing.values[0]),
        float(asc.easting.values[1] - asc.easting.values[0]),
    )
    kwargs = {} if damping is None else {"damping": float(damping)}
    result = rtp_layer.layer_reduction_to_pole(
        values,
        spacing,
        float(inclination),
        float(declination),
        float(m_inc),
        float(m_dec),
        depth=depth,
        **kwargs,
    )
    prep = PaddedGrid(
        padded=values,
        inner=(slice(None), slice(None)),
        filled=values,
        mask=~np.isfinite(values),
        plane=np.zeros_like(values),
        slope=(0.0, 0.0),
        spacing=spacing,
        flipped=flipped,
        notes=[
            (
                f"dipole layer {result.depth:g} m below the grid, one source per "
                f"cell, damping {result.damping:g}, {result.iterations} CGLS "
                f"iterations, fit RMS {result.residual_rms:.3g}"
            )
        ],
    )
    units, long_name = _source(grid)
    step = (
        "reduction to the pole by an equivalent dipole layer (Silva 1986; Li and Oldenburg "
        f"2001), I {inclination:g} D {declination:g}"
    )
    return _finish(
        grid,
        prep,
        result.rtp,
        suffix="rtp",
        units=units,
        long_name=f"{long_name} reduced to the pole",
        step=step,
        rtp_method="sources",
        inclination=float(inclination),
        declination=float(declination),
        mag_inclination=float(m_inc),
        mag_declination=float(m_dec),
        layer_depth=result.depth,
        layer_damping=result.damping,
        layer_iterations=int(result.iterations),
        layer_residual_rms=result.residual_rms,
    )
