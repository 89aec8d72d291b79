"""Separation of potential fields by the position of their sources.

Three families of methods, all on plain numpy arrays / xarray grids:

Regional and residual (survey grids)
    :func:`regional_upward` (upward continuation as a regional filter; Jacobsen 1987,
    Geophysics 52:1138) and :func:`fit_two_layer` (two equivalent-source layers fitted together,
    the deep one being the regional; Dampney 1969, Geophysics 34:39; Cordell 1992, Geophysics
    57:629; Soler and Uieda 2021, GJI 227:1768).

Internal and external parts on a plane
    :func:`separate_vector_plane` splits north, east, down components measured on a plane into
    the parts of sources below and above it, in the wavenumber domain (Siebert and Kertz 1957,
    Nachr. Akad. Wiss. Göttingen; Weaver 1964, Z. Geophys. 30:29; Porath, Oldenburg and Gough
    1970, Geophys. J. R. Astr. Soc. 19:237); :func:`separate_two_heights` does the same for one
    harmonic scalar measured on two planes.

Internal and external parts on the sphere
    :func:`fit_gauss_coefficients` fits the Gauss coefficients of an internal and an external
    potential to a network of vector stations at every epoch (Gauss 1839; Chapman and Bartels
    1940, Geomagnetism, Oxford; Olsen, Glassmeier and Jia 2010, Space Sci. Rev. 152:135);
    :func:`induction_ratio` regresses the induced internal on the external coefficient;
    :func:`external_field_at` evaluates the fitted external plus induced field at any site
    as a total-field variation (a remote reference for a survey's diurnal correction).

Conventions: grids have dimensions ``("northing", "easting")`` (potfield.io.grids); on the plane
``z`` is positive down, ``north`` along increasing northing and ``east`` along increasing
easting (grid north is taken as true north). Spherical components are geodetic north, east and
down (X, Y, Z), nT.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.fft
import scipy.linalg
import xarray as xr
from numpy.typing import ArrayLike

from .._numerics import block_median, damped_lstsq, median_spacing
from ..errors import BadGeometry, BadParameter, IllPosed, NotEnoughData
from . import spherical
from . import transforms as tf
from .eqsources.kernels import _dense_jacobian
from .eqsources.model import EquivalentSourceModel

__all__ = [
    "regional_upward",
    "TwoLayerSources",
    "fit_two_layer",
    "two_layer_dampings",
    "separate_vector_plane",
    "separate_two_heights",
    "GaussFit",
    "fit_gauss_coefficients",
    "coefficient_table",
    "induction_ratio",
    "external_field_at",
    "nearest_station",
    "remote_reference_caution",
]

#: Mean Earth radius (km) for great-circle distances (the IGRF reference radius).
EARTH_RADIUS_KM = 6371.2
UNIFORM_CHOICES = ("internal", "external")
#: Singular values of the Gauss-coefficient design matrix below this fraction of the largest
#: count as unresolved: such a direction amplifies data errors more than 100 times as much as
#: the best-determined one (common practice for truncated-SVD rank decisions).
RANK_TOLERANCE = 1e-2


# ==============================================================================================
# Regional / residual
# ==============================================================================================
def regional_upward(
    grid: xr.DataArray,
    height: float,
    *,
    model: EquivalentSourceModel | None = None,
    grid_height: float | None = None,
    pad_fraction: float = 0.5,
    pad_mode: str = "reflect",
) -> tuple[xr.DataArray, xr.DataArray]:
    """Regional field by upward continuation, residual = field - regional.

    Continuing the field upward by ``height`` attenuates each wavenumber by ``exp(-|k| height)``,
    so the continued field is dominated by sources deeper than about ``height / 2``; used as the
    regional, it separates deep from shallow sources without an arbitrary filter design
    (Jacobsen 1987, Geophysics 52:1138). When an equivalent-source model of the field is given
    it is predicted at the higher surface (exact for that model, no FFT edge effects; Dampney
    1969, Geophysics 34:39); else the grid is continued by FFT with padding and taper (Blakely
    1995, Potential Theory in Gravity and Magnetic Applications, CUP, ch. 12).

    Parameters
    ----------
    grid : xarray.DataArray
        Field on a regular grid, dims ``("northing", "easting")``, NaN = masked.
    height : float
        Continuation distance (m, > 0).
    model : object with ``predict((easting, northing, upward))``, optional
        Equivalent-source model of the same field (e.g. from potfield.fields.harmonic.eqsources).
    grid_height : float or array, optional
        Height (m) of the grid surface; required with ``model``.
    pad_fraction, pad_mode
        FFT padding (see potfield.fields.harmonic.transforms.pad_grid).

    Returns
    -------
    regional, residual : xarray.DataArray
        Named ``regional_upward`` and ``residual_upward``, masked like ``grid``; attribute
        ``separation_method`` is ``"model"`` or ``"fft"``.
    """
    if not (np.isfinite(height) and height > 0):
        raise BadParameter(f"regional height {height} m must be positive", hint="give a height in metres > 0")
    grid = grid.transpose("northing", "easting")
    if model is not None and grid_height is not None:
        regional = tf.model_upward_continuation(model.predict, grid, height, grid_height)
        how = "model"
    else:
        regional = tf.upward_continuation(grid, height, pad_fraction=pad_fraction, pad_mode=pad_mode)
        how = "fft"
    units = grid.attrs.get("units", "")
    regional = regional.rename("regional_upward")
    regional.attrs.update(
        {
            "long_name": f"regional field: upward continuation by {height:g} m ({how})",
            "units": units,
            "separation_method": how,
            "history": regional.attrs.get("history", "") + "; regional by upward continuation "
            "(Jacobsen 1987)",
        }
    )
    residual = (grid - regional).rename("residual_upward")
    residual.attrs = {
        "units": units,
        "separation_method": how,
        "long_name": f"residual field: field minus its upward continuation by {height:g} m",
        "history": grid.attrs.get("history", "") + "; residual = field - regional "
        "(upward continuation, Jacobsen 1987)",
    }
    return regional, residual


@dataclass
class TwoLayerSources:
    """Two equivalent-source layers fitted together.

    Attributes
    ----------
    deep, shallow : potfield.fields.harmonic.eqsources.EquivalentSourceModel
        Each layer's sources (``"dense"`` models: positions, coefficients, kernel ``depth / r``);
        their ``predict`` gives each layer's field.
    deep_depth, shallow_depth : float
        Source depth below the (block-averaged) data positions (m).
    deep_damping, shallow_damping : float
        Damping of each layer in the joint objective (see :func:`fit_two_layer`).
    rms : float
        RMS misfit of the joint fit at the data (data units).
    """

    deep: EquivalentSourceModel
    shallow: EquivalentSourceModel
    deep_depth: float
    shallow_depth: float
    deep_damping: float
    shallow_damping: float
    rms: float
    info: dict = field(default_factory=dict)

    def predict_regional(self, coordinates: tuple) -> np.ndarray:
        """Field of the deep layer (the regional) at ``(easting, northing, upward)``."""
        return self.deep.predict(coordinates)

    def predict_residual(self, coordinates: tuple) -> np.ndarray:
        """Field of the shallow layer at ``(easting, northing, upward)``."""
        return self.shallow.predict(coordinates)

    def predict(self, coordinates: tuple) -> np.ndarray:
        """Field of both layers."""
        return self.deep.predict(coordinates) + self.shallow.predict(coordinates)


def _block_positions(e, n, u, block):
    """Block-median source positions; blocks stretched to fit the data region as verde's
    BlockReduce does by default (the behaviour this fit was built with)."""
    if not block:
        return e.copy(), n.copy(), u.copy()
    positions, _ = block_median(e, n, u, np.zeros_like(e), block, stretch=True)
    return positions


def two_layer_dampings(
    crossover_wavelength: float,
    deep_depth: float,
    shallow_depth: float,
    deep_spacing: float,
    shallow_spacing: float,
    deep_damping: float = 1e-3,
) -> tuple[float, float]:
    """Damping of the shallow layer that puts the deep/shallow split at a chosen wavelength.

    With the dimensionless kernel ``depth / r``, a layer of sources at spacing ``s`` and depth
    ``h`` makes a field of wavenumber ``k`` with coefficients of energy (per unit area)
    ``|F|^2 k^2 (s/h)^2 exp(2 k h) / (4 pi^2)`` (the layer's spectrum ``2 pi exp(-k h) / k``
    times its density; Blakely 1995, Potential Theory in Gravity and Magnetic Applications, CUP,
    ch. 11, for the spectrum of a layer of monopoles). Minimising ``damping_d |c_d|^2 + damping_s |c_s|^2``
    under ``F_d + F_s = F`` gives the deep layer the fraction
    ``1 / (1 + exp(2 k (h_d - h_s)) / rho)`` with ``rho = damping_s (s_s/h_s)^2 /
    (damping_d (s_d/h_d)^2)`` of each wavenumber: a smooth low-pass whose half point
    ``k_c = ln(rho) / (2 (h_d - h_s))`` is set here to ``2 pi / crossover_wavelength``.
    (Derived here from the minimum-norm property of damped least squares.)

    Parameters
    ----------
    crossover_wavelength : float
        Wavelength (m) shared equally by the two layers.
    deep_depth, shallow_depth, deep_spacing, shallow_spacing : float
        Depths and source spacings of the layers (m).
    deep_damping : float
        Damping of the deep layer.

    Returns
    -------
    deep_damping, shallow_damping : float
    """
    k_c = 2.0 * np.pi / float(crossover_wavelength)
    rho = np.exp(2.0 * k_c * (deep_depth - shallow_depth))
    ratio = rho * (deep_spacing / deep_depth) ** 2 / (shallow_spacing / shallow_depth) ** 2
    return float(deep_damping), float(deep_damping * ratio)


def fit_two_layer(
    coordinates: tuple,
    data: ArrayLike,
    *,
    deep_depth: float,
    shallow_depth: float,
    deep_block: float | None = None,
    shallow_block: float | None = None,
    deep_damping: float | None = None,
    shallow_damping: float | None = None,
    crossover_wavelength: float | None = None,
    weights: ArrayLike | None = None,
) -> TwoLayerSources:
    """Fit a deep and a shallow equivalent-source layer together; the deep layer is the regional.

    Each layer is a set of point sources with the ``1/r`` Green's function at a relative depth
    below block-median data positions (Cordell 1992, Geophysics 57:629; Soler and Uieda 2021,
    GJI 227:1768), returned as a ``"dense"``
    :class:`~potfield.fields.harmonic.eqsources.EquivalentSourceModel`. The two Jacobians (kernel
    ``depth / r``, so it is dimensionless and the coefficients carry the data unit) are stacked
    and the joint damped
    least-squares problem ::

        min  sum_i w_i (d_i - [J_d c_d + J_s c_s]_i)^2 + damping_d |c_d|^2 + damping_s |c_s|^2

    (weights normalised to mean 1) is solved directly. Deep sources can only make smooth fields;
    the shallow layer could make any field, so the split is set by the dampings: see
    :func:`two_layer_dampings`, used when ``shallow_damping`` is None (the equivalent-layer
    separation idea: Pawlowski 1994, Geophysics 59:69, for the equivalent-source regional;
    Dampney 1969, Geophysics 34:39).

    Parameters
    ----------
    coordinates : tuple of arrays
        ``(easting, northing, upward)`` of the data (m).
    data : array
        Field values; NaN are ignored.
    deep_depth, shallow_depth : float
        Depth of each layer below the block-median data positions (m), deep > shallow > 0.
    deep_block, shallow_block : float, optional
        Block sizes (m) for the source positions; default ``deep_depth / 2`` for the deep layer
        and one source per datum for the shallow layer.
    deep_damping, shallow_damping : float, optional
        Dampings; default ``1e-3`` for the deep layer and the shallow one from
        :func:`two_layer_dampings` at ``crossover_wavelength``.
    crossover_wavelength : float, optional
        Needed when ``shallow_damping`` is None (m).
    weights : array, optional
        Data weights.

    Returns
    -------
    TwoLayerSources
    """
    e, n, u, d = (np.asarray(a, dtype=float).ravel() for a in np.broadcast_arrays(*coordinates[:3], data))
    w = np.ones_like(d) if weights is None else np.asarray(weights, dtype=float).ravel()
    good = np.isfinite(e) & np.isfinite(n) & np.isfinite(u) & np.isfinite(d) & np.isfinite(w) & (w > 0)
    e, n, u, d, w = e[good], n[good], u[good], d[good], w[good]
    if d.size < 10:
        raise NotEnoughData(
            f"only {d.size} finite data for the two-layer separation", hint="at least 10 are needed"
        )
    if not (deep_depth > shallow_depth > 0):
        raise BadParameter(
            f"two-layer depths must satisfy deep > shallow > 0 (got deep {deep_depth:g} m, "
            f"shallow {shallow_depth:g} m)",
            hint="make the deep layer deeper than the shallow one",
        )
    w = w / w.mean()
    deep_block = float(deep_block) if deep_block else 0.5 * float(deep_depth)
    pos_d = _block_positions(e, n, u, deep_block)
    pos_s = _block_positions(e, n, u, shallow_block)
    pts_d = (pos_d[0], pos_d[1], pos_d[2] - deep_depth)
    pts_s = (pos_s[0], pos_s[1], pos_s[2] - shallow_depth)
    spacing_s = float(shallow_block) if shallow_block else median_spacing(e, n)
    if shallow_damping is None:
        if crossover_wavelength is None:
            raise BadParameter("give shallow_damping or crossover_wavelength")
        deep_damping, shallow_damping = two_layer_dampings(
            crossover_wavelength,
            deep_depth,
            shallow_depth,
            deep_block,
            spacing_s,
            1e-3 if deep_damping is None else deep_damping,
        )
    elif deep_damping is None:
        deep_damping = 1e-3
    nd, ns = pts_d[0].size, pts_s[0].size
    jac = np.empty((e.size, nd + ns))
    for cols, pts, depth in ((slice(0, nd), pts_d, deep_depth), (slice(nd, nd + ns), pts_s, shallow_depth)):
        layer = np.empty((e.size, pts[0].size))
        _dense_jacobian(e, n, u, *(np.ascontiguousarray(p, dtype=float) for p in pts), float(depth), layer)
        jac[:, cols] = layer
    sw = np.sqrt(w)
    jac *= sw[:, None]
    damping = np.r_[np.full(nd, float(deep_damping)), np.full(ns, float(shallow_damping))]
    coefs = damped_lstsq(jac, sw * d, damping)
    fitted = (jac @ coefs) / sw
    del jac
    region = (float(e.min()), float(e.max()), float(n.min()), float(n.max()))
    deep, shallow = (
        EquivalentSourceModel(
            "dense", pts, c, float(depth), float(depth), float(damp), float(block or 0.0), region
        )
        for pts, c, depth, damp, block in (
            (pts_d, coefs[:nd], deep_depth, deep_damping, deep_block),
            (pts_s, coefs[nd:], shallow_depth, shallow_damping, shallow_block),
        )
    )
    rms = float(np.sqrt(np.mean((d - fitted) ** 2)))
    return TwoLayerSources(
        deep,
        shallow,
        float(deep_depth),
        float(shallow_depth),
        float(deep_damping),
        float(shallow_damping),
        rms,
        info={
            "deep_sources": int(nd),
            "shallow_sources": int(pts_s[0].size),
            "data": int(d.size),
            "deep_block": deep_block,
            "shallow_spacing": spacing_s,
        },
    )


# ==============================================================================================
# Internal / external on a plane
# ==============================================================================================
def _prepared(
    grid: xr.DataArray, pad_fraction: float, pad_mode: str, detrend: bool
) -> tuple[tf.PaddedGrid, np.ndarray, np.ndarray]:
    """Filled, detrended (plane or mean), padded spectrum of one grid, and the trend removed."""
    filled = tf.fill_masked(grid) if np.isnan(grid.values).any() else grid
    if detrend:
        prep = tf.pad_grid(filled, pad_fraction, pad_mode, taper=True, detrend=True)
        trend = prep.plane
    else:
        mean = float(np.nanmean(filled.values))
        prep = tf.pad_grid(filled - mean, pad_fraction, pad_mode, taper=True, detrend=False)
        trend = np.full(prep.filled.shape, mean)
    return prep, trend, scipy.fft.rfft2(prep.padded)


def _check_trend(trend: str) -> None:
    if trend not in ("mean", "plane"):
        raise BadParameter(
            f"trend '{trend}' is not 'mean' or 'plane'", hint="use 'mean' (default) or 'plane'"
        )


def _check_same(grids, names):
    first = grids[0].transpose("northing", "easting")
    for g, name in zip(grids, names):
        g = g.transpose("northing", "easting")
        if g.shape != first.shape or not (
            np.allclose(g.easting, first.easting) and np.allclose(g.northing, first.northing)
        ):
            raise BadGeometry(
                f"grid '{name}' is not on the same cells as '{names[0]}'",
                hint="grid every component on the same region and spacing",
            )
    return [g.transpose("northing", "easting").sortby(["northing", "easting"]) for g in grids]


def _out_grid(
    template: xr.DataArray,
    values: np.ndarray,
    mask: np.ndarray,
    name: str,
    long_name: str,
    units: str,
    history: str,
) -> xr.DataArray:
    out = xr.DataArray(
        np.where(mask, np.nan, values),
        dims=("northing", "easting"),
        coords={"northing": template.northing.values, "easting": template.easting.values},
        name=name,
    )
    out.attrs = {"units": units, "long_name": long_name, "history": history}
    return out


def separate_vector_plane(
    north: xr.DataArray,
    east: xr.DataArray,
    down: xr.DataArray,
    *,
    uniform: str = "external",
    trend: str = "mean",
    pad_fraction: float = 1.0,
    pad_mode: str = "edge",
) -> dict[str, xr.DataArray]:
    """Split a vector field on a plane into the parts of sources below and above the plane.

    On the plane ``z = 0`` (``z`` down) outside the sources, the Fourier transforms (convention
    ``f(x) = integral F(k) exp(i k.x) dk``) of the vertical ``Z`` and horizontal ``H = (N, E)``
    components of the fields of sources below (internal) and above (external) obey
    ``H_int = i k Z_int / |k|`` and ``H_ext = -i k Z_ext / |k|``, so (Siebert and Kertz 1957;
    Weaver 1964, Z. Geophys. 30:29; Porath, Oldenburg and Gough 1970, Geophys. J. R. Astr. Soc.
    19:237)::

        Z_int = (Z - i k.H / |k|) / 2      Z_ext = (Z + i k.H / |k|) / 2
        H_int = (H + i k Z / |k|) / 2      H_ext = (H - i k Z / |k|) / 2

    The parts add up to the data exactly; a part of ``H`` that no potential explains is split
    equally. The uniform (zero-wavenumber) part cannot be attributed from one plane: it goes to
    the part named by ``uniform``. Masked cells are filled smoothly, each component has its mean
    removed and is padded with a cosine taper (Blakely 1995, ch. 12); results near the edges are
    less reliable.

    Parameters
    ----------
    north, east, down : xarray.DataArray
        Components (nT) on the same regular grid, dims ``("northing", "easting")``; ``north``
        along increasing northing, ``east`` along increasing easting, ``down`` positive down.
    uniform : {"external", "internal"}
        Where the trend removed from each component goes.
    trend : {"mean", "plane"}
        Removed before the transform and given to the ``uniform`` side: the mean (default) or a
        least-squares plane (then a uniform gradient is not separated either).
    pad_fraction, pad_mode
        FFT padding (potfield.fields.harmonic.transforms.pad_grid).

    Returns
    -------
    dict of xarray.DataArray
        ``internal_north``, ``internal_east``, ``internal_down``, ``external_north``,
        ``external_east``, ``external_down`` (ascending coordinates, masked like the input).
    """
    if uniform not in UNIFORM_CHOICES:
        raise BadParameter(
            f"uniform part '{uniform}' is not one of {UNIFORM_CHOICES}", hint="use 'external' or 'internal'"
        )
    _check_trend(trend)
    north, east, down = _check_same([north, east, down], ["north", "east", "down"])
    mask = ~(np.isfinite(north.values) & np.isfinite(east.values) & np.isfinite(down.values))
    if mask.all():
        raise NotEnoughData(
            "the vector grids have no cell where all three components are known",
            hint="the north, east and down grids must overlap",
        )
    (pn, mn, sn), (pe, me, se), (pd_, md, sd) = (
        _prepared(g, pad_fraction, pad_mode, trend == "plane") for g in (north, east, down)
    )
    k_e, k_n, k = pn.wavenumbers()
    with np.errstate(divide="ignore", invalid="ignore"):
        ue, un = np.where(k > 0, k_e / k, 0.0), np.where(k > 0, k_n / k, 0.0)
    ikh = 1j * (un * sn + ue * se)
    z_int, z_ext = 0.5 * (sd - ikh), 0.5 * (sd + ikh)
    n_int, n_ext = 0.5 * (sn + 1j * un * sd), 0.5 * (sn - 1j * un * sd)
    e_int, e_ext = 0.5 * (se + 1j * ue * sd), 0.5 * (se - 1j * ue * sd)
    # zero wavenumber: the (zero, after mean removal) constant goes to the chosen side
    for spec_int, spec_ext, spec in ((z_int, z_ext, sd), (n_int, n_ext, sn), (e_int, e_ext, se)):
        target, other = (spec_ext, spec_int) if uniform == "external" else (spec_int, spec_ext)
        target[0, 0], other[0, 0] = spec[0, 0], 0.0
    shape = pn.padded.shape
    means = {"north": mn, "east": me, "down": md}
    parts = {
        "internal_north": n_int,
        "internal_east": e_int,
        "internal_down": z_int,
        "external_north": n_ext,
        "external_east": e_ext,
        "external_down": z_ext,
    }
    out = {}
    history = (
        "internal/external separation on a plane (Weaver 1964; Porath, Oldenburg and Gough "
        f"1970); uniform part to the {uniform} side; {'; '.join(pn.notes)}"
    )
    for name, spec in parts.items():
        side, comp = name.split("_")
        values = pn.unpad(scipy.fft.irfft2(spec, s=shape))
        if side == uniform:
            values = values + means[comp]
        out[name] = _out_grid(
            north,
            values,
            mask,
            name,
            f"{comp} component of the field of sources "
            f"{'below' if side == 'internal' else 'above'} the plane",
            north.attrs.get("units", "nT"),
            history,
        )
    return out


def separate_two_heights(
    lower: xr.DataArray,
    upper: xr.DataArray,
    separation_m: float,
    *,
    uniform: str = "external",
    trend: str = "mean",
    regularisation: float = 0.1,
    pad_fraction: float = 1.0,
    pad_mode: str = "edge",
) -> dict[str, xr.DataArray]:
    """Split a harmonic scalar measured on two horizontal planes into internal and external parts.

    A harmonic scalar (gravity, one field component, or approximately a total-field anomaly)
    between sources below and above is, per wavenumber, ``F(h) = I exp(-|k| h) + E exp(|k| h)``
    at height ``h`` above the lower plane (continuation, Blakely 1995, Potential Theory in
    Gravity and Magnetic Applications, CUP, ch. 12; the separation principle of Gauss 1839 on a
    plane). Two planes ``h = 0`` and ``h = dh`` give, at the lower plane::

        I = (F_0 exp(|k| dh) - F_dh) / (2 sinh(|k| dh))
        E = (F_dh - F_0 exp(-|k| dh)) / (2 sinh(|k| dh))

    ``1 / (2 sinh)`` grows without bound at long wavelengths, so it is damped as
    ``2 sinh / (4 sinh^2 + eps)`` with ``eps = regularisation (2 sinh(2 pi dh / L))^2`` (``L``
    the grid's extent: ``regularisation = 1`` would halve the gain at the longest wavelength
    the grid holds; the default 0.1 acts only near it) in the part opposite to ``uniform``; the ``uniform``
    side is the lower plane minus that part, so the two parts add up to the lower plane and the
    long wavelengths the regularisation holds back (and the trend) go to the ``uniform`` side.

    Parameters
    ----------
    lower, upper : xarray.DataArray
        The scalar on the same grid at the lower plane and ``separation_m`` above it.
    separation_m : float
        Height difference (m, > 0).
    uniform : {"external", "internal"}
        Where the trend of the lower plane (its mean, or plane) goes.
    trend : {"mean", "plane"}
        Trend removed from both planes before the transform.
    regularisation : float
        Damping of the long-wavelength amplification, relative to the grid's longest
        wavelength (dimensionless, >= 0; 0 = none).
    pad_fraction, pad_mode
        FFT padding.

    Returns
    -------
    internal, external : xarray.DataArray
        Parts at the lower plane (ascending coordinates, masked like the inputs).
    """
    if not (np.isfinite(separation_m) and separation_m > 0):
        raise BadParameter(
            f"height difference {separation_m} m between the planes must be > 0",
            hint="give the upper plane's height above the lower one",
        )
    if uniform not in UNIFORM_CHOICES:
        raise BadParameter(
            f"uniform part '{uniform}' is not one of {UNIFORM_CHOICES}", hint="use 'external' or 'internal'"
        )
    _check_trend(trend)
    lower, upper = _check_same([lower, upper], ["lower", "upper"])
    mask = ~(np.isfinite(lower.values) & np.isfinite(upper.values))
    (p0, m0, s0), (p1, m1, s1) = (
        _prepared(g, pad_fraction, pad_mode, trend == "plane") for g in (lower, upper)
    )
    _, _, k = p0.wavenumbers()
    kd = k * float(separation_m)
    two_sinh = 2.0 * np.sinh(np.minimum(kd, 350.0))
    extent = max(float(np.ptp(lower.easting.values)), float(np.ptp(lower.northing.values)))
    eps = float(regularisation) * (2.0 * np.sinh(2.0 * np.pi * float(separation_m) / extent)) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        gain = np.where(two_sinh > 0, two_sinh / (two_sinh**2 + eps), 0.0)
    decay = np.exp(-np.minimum(kd, 700.0))
    # I = (F0 e^{kd} - F1)/(2 sinh) = (F0 - F1 e^{-kd}) / (1 - e^{-2kd}) for large kd
    spec_int = (s0 * np.exp(np.minimum(kd, 350.0)) - s1) * gain
    spec_ext = (s1 - s0 * decay) * gain
    large = kd > 30.0  # e^{kd} / (2 sinh) -> 1: avoid overflow, I -> F0, E -> F1 e^{-kd}
    spec_int = np.where(large, s0 - s1 * decay, spec_int)
    spec_ext = np.where(large, s1 * decay - s0 * decay**2, spec_ext)
    # the parts add up to the lower plane: the side that takes the uniform part also takes what
    # the regularisation holds back at long wavelengths
    if uniform == "external":
        spec_int[0, 0] = 0.0
        spec_ext = s0 - spec_int
    else:
        spec_ext[0, 0] = 0.0
        spec_int = s0 - spec_ext
    shape = p0.padded.shape
    history = (
        f"internal/external separation from two planes {separation_m:g} m apart "
        f"(continuation, Blakely 1995 ch. 12); relative regularisation {regularisation:g}"
    )
    values_int = p0.unpad(scipy.fft.irfft2(spec_int, s=shape))
    values_ext = p0.unpad(scipy.fft.irfft2(spec_ext, s=shape))
    if uniform == "external":
        values_ext = values_ext + m0
    else:
        values_int = values_int + m0
    units = lower.attrs.get("units", "")
    return (
        _out_grid(lower, values_int, mask, "internal", "field of sources below the planes", units, history),
        _out_grid(lower, values_ext, mask, "external", "field of sources above the planes", units, history),
    )


# ==============================================================================================
# Internal / external on the sphere
# ==============================================================================================
@dataclass
class GaussFit:
    """Gauss coefficients fitted at every epoch, and what they do and do not explain.

    Attributes
    ----------
    internal_names, external_names : list of str
        ``g10, g11, h11, ...`` and ``q10, q11, s11, ...``.
    coefficients : numpy.ndarray
        Shape ``(n_epochs, n_internal + n_external)`` (nT), internal first; NaN at epochs the
        available stations cannot resolve.
    internal, external : numpy.ndarray
        Fitted internal and external fields at the stations, shape ``(3, n_epochs,
        n_stations)`` (geodetic north, east, down, nT).
    residual : numpy.ndarray
        Data minus both fitted parts, ``(3, n_epochs, n_stations)`` (NaN where data are missing):
        the non-potential part plus noise plus what the truncation leaves out.
    groups : int
        Number of distinct sets of available data (one solve each).
    unsolved_epochs : int
        Epochs with too few data to resolve the coefficients (NaN coefficients).
    condition : float
        Condition number of the full network's design matrix.
    """

    internal_names: list[str]
    external_names: list[str]
    coefficients: np.ndarray
    internal: np.ndarray
    external: np.ndarray
    residual: np.ndarray
    groups: int
    unsolved_epochs: int
    condition: float
    damping: float = 0.0

    @property
    def names(self) -> list[str]:
        return self.internal_names + self.external_names

    def coefficient(self, name: str) -> np.ndarray:
        """Time series of one coefficient (nT)."""
        return self.coefficients[:, self.names.index(name)]


def _same_longitude(longitude: ArrayLike) -> bool:
    lon = np.radians(np.asarray(longitude, dtype=float))
    z = np.exp(1j * lon)
    return bool(np.max(np.abs(z - z[0])) < 1e-9)


def fit_gauss_coefficients(
    north: ArrayLike,
    east: ArrayLike,
    down: ArrayLike,
    longitude: ArrayLike,
    latitude: ArrayLike,
    height: ArrayLike,
    *,
    internal_degree: int = 1,
    external_degree: int = 1,
    damping: float = 0.0,
    stations: list[str] | None = None,
) -> GaussFit:
    """Least-squares Gauss coefficients of internal and external potentials at every epoch.

    The disturbance field ``(X, Y, Z)`` at ``S`` stations (main field removed) is modelled at
    each epoch as the field of ``V = a sum { (a/r)^(n+1) [g cos + h sin] + (r/a)^n [q cos +
    s sin] } P_n^m`` to degrees ``internal_degree`` and ``external_degree`` (Gauss 1839; Chapman
    and Bartels 1940, Geomagnetism, Oxford; Olsen, Glassmeier and Jia 2010, Space Sci. Rev.
    152:135). One design matrix ``G`` (3 S rows) serves every epoch: epochs are grouped by their
    set of available data and each group is solved at once for all its epochs (one
    least-squares solve with many right-hand sides), minimising
    ``|d - G m|^2 + damping |m|^2``.

    Parameters
    ----------
    north, east, down : array_like, shape (n_epochs, n_stations)
        Geodetic components (nT); NaN = missing.
    longitude, latitude, height : array_like, shape (n_stations,)
        Geodetic station positions (degrees, m above the ellipsoid).
    internal_degree, external_degree : int
        Degrees of the two expansions (>= 1; 0 leaves the part out).
    damping : float
        Tikhonov damping (>= 0, nT-free: the design matrix is dimensionless).
    stations : sequence of str, optional
        Station names for messages.

    Returns
    -------
    GaussFit

    Raises
    ------
    potfield.fields.errors.NotEnoughData, potfield.fields.errors.IllPosed
        More unknowns than data in the whole network, or a network that cannot resolve the
        coefficients (e.g. all stations on one meridian) with ``damping = 0``.
    """
    data = [np.atleast_2d(np.asarray(a, dtype=float)) for a in (north, east, down)]
    if not (data[0].shape == data[1].shape == data[2].shape):
        raise BadGeometry("north, east and down must have the same shape (n_epochs, n_stations)")
    n_epochs, n_st = data[0].shape
    lon, lat, h = (np.asarray(a, dtype=float).ravel() for a in (longitude, latitude, height))
    if not (lon.size == lat.size == h.size == n_st):
        raise BadGeometry("one longitude, latitude and height per station (column) is needed")
    ni, ne = int(internal_degree), int(external_degree)
    if ni < 0 or ne < 0 or ni + ne == 0:
        raise BadParameter(
            f"internal_degree {ni} and external_degree {ne}: at least one must be >= 1 and neither negative",
            hint="use e.g. internal_degree = 1 and external_degree = 1",
        )
    if not damping >= 0:
        raise BadParameter(f"damping {damping} must be >= 0", hint="use 0 (none) or a small positive value")
    blocks = []
    if ni:
        blocks.append(np.concatenate(spherical.geodetic_design_matrices(lon, lat, h, ni, "internal"), axis=0))
    if ne:
        blocks.append(np.concatenate(spherical.geodetic_design_matrices(lon, lat, h, ne, "external"), axis=0))
    G = np.hstack(blocks)  # (3 S, unknowns), rows: north of all stations, east, down
    n_int = spherical.n_coefficients(ni) if ni else 0
    n_unk = G.shape[1]
    D = np.concatenate(data, axis=1)  # (epochs, 3 S)
    avail = np.isfinite(D)
    present = avail.reshape(n_epochs, 3, n_st).any(axis=(0, 1))
    n_data = int(3 * present.sum())
    if n_unk > n_data:
        raise NotEnoughData(
            f"{n_unk} Gauss coefficients (internal degree {ni}, external degree {ne}) but only "
            f"{present.sum()} stations with data = {n_data} components",
            hint="lower the degrees (degree 1 + 1 needs 6 unknowns, i.e. at least 2 stations) "
            "or add stations",
        )
    cols = np.tile(present, 3)
    singular = scipy.linalg.svdvals(G[cols])
    rank = int(np.sum(singular > singular[0] * RANK_TOLERANCE))
    condition = float(singular[0] / singular[-1]) if singular[-1] > 0 else float("inf")
    if rank < n_unk and damping == 0:
        if _same_longitude(lon[present]):
            detail = (
                f"all {present.sum()} stations lie on longitude {lon[present][0]:g}, so the "
                "internal and external order m > 0 terms cannot be told apart"
            )
        else:
            detail = (
                f"the design matrix of the {present.sum()} stations has effective rank "
                f"{rank} for {n_unk} unknowns (condition number {condition:.3g})"
            )
        raise IllPosed(
            f"the station network cannot resolve the Gauss coefficients: {detail}",
            hint="add stations spread in longitude and latitude, lower the degrees, or set a damping > 0",
        )
    coefs = np.full((n_epochs, n_unk), np.nan)
    patterns, inverse = np.unique(avail, axis=0, return_inverse=True)
    inverse = np.asarray(inverse).ravel()
    unsolved = 0
    for g, pattern in enumerate(patterns):  # loop over availability groups (not readings)
        epochs = np.flatnonzero(inverse == g)
        Gs = G[pattern]
        if Gs.shape[0] == 0 or (damping == 0 and Gs.shape[0] < n_unk):
            unsolved += epochs.size
            continue
        Ds = D[np.ix_(epochs, np.flatnonzero(pattern))].T  # (rows, epochs)
        if damping > 0:
            A = np.vstack([Gs, np.sqrt(damping) * np.eye(n_unk)])
            B = np.vstack([Ds, np.zeros((n_unk, epochs.size))])
        else:
            A, B = Gs, Ds
        sol, _, r, sv = scipy.linalg.lstsq(A, B, cond=RANK_TOLERANCE, lapack_driver="gelsd")
        if r < n_unk:
            unsolved += epochs.size
            continue
        coefs[epochs] = sol.T
    internal = (coefs[:, :n_int] @ G[:, :n_int].T).reshape(n_epochs, 3, n_st).transpose(1, 0, 2)
    external = (coefs[:, n_int:] @ G[:, n_int:].T).reshape(n_epochs, 3, n_st).transpose(1, 0, 2)
    observed = D.reshape(n_epochs, 3, n_st).transpose(1, 0, 2)
    residual = observed - internal - external
    return GaussFit(
        internal_names=spherical.coefficient_names(ni, "internal") if ni else [],
        external_names=spherical.coefficient_names(ne, "external") if ne else [],
        coefficients=coefs,
        internal=internal,
        external=external,
        residual=residual,
        groups=int(len(patterns)),
        unsolved_epochs=int(unsolved),
        condition=condition,
        damping=float(damping),
    )


def coefficient_table(times: ArrayLike, fit: GaussFit) -> pd.DataFrame:
    """The coefficient time series as a table: ``time`` then one column per coefficient (nT)."""
    table = pd.DataFrame(fit.coefficients, columns=fit.names)
    table.insert(0, "time", np.asarray(times, dtype="datetime64[ns]"))
    return table


def induction_ratio(internal: ArrayLike, external: ArrayLike) -> dict[str, float]:
    """Ratio of induced internal to external coefficient by regression of their time series.

    Least squares ``internal = ratio * external + offset`` over the epochs where both are finite
    (the transfer-function idea of Olsen, Glassmeier and Jia 2010, Space Sci. Rev. 152:135; the
    degree-1 ratio of the conducting Earth is often quoted as about 0.25-0.3 for storm-time
    variations). The offset absorbs constant internal parts (e.g. station biases).

    Parameters
    ----------
    internal, external : array_like
        E.g. the ``g10`` and ``q10`` time series (nT).

    Returns
    -------
    dict
        ``ratio``, ``offset`` (nT), ``correlation`` and ``epochs`` (count used).
    """
    x = np.asarray(external, dtype=float).ravel()
    y = np.asarray(internal, dtype=float).ravel()
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() < 3 or np.ptp(x[ok]) == 0:
        return {
            "ratio": float("nan"),
            "offset": float("nan"),
            "correlation": float("nan"),
            "epochs": int(ok.sum()),
        }
    x, y = x[ok], y[ok]
    xm, ym = x.mean(), y.mean()
    sxx, sxy, syy = np.sum((x - xm) ** 2), np.sum((x - xm) * (y - ym)), np.sum((y - ym) ** 2)
    ratio = sxy / sxx
    corr = sxy / np.sqrt(sxx * syy) if syy > 0 else float("nan")
    return {
        "ratio": float(ratio),
        "offset": float(ym - ratio * xm),
        "correlation": float(corr),
        "epochs": int(x.size),
    }


def _split_names(columns):
    """Internal and external coefficient columns of a coefficient table, in IGRF order."""
    import re

    internal = [c for c in columns if re.fullmatch(r"[gh]\d+(_\d+)?", str(c))]
    external = [c for c in columns if re.fullmatch(r"[qs]\d+(_\d+)?", str(c))]
    out = []
    for cols, source in ((internal, "internal"), (external, "external")):
        if not cols:
            out.append((0, []))
            continue
        nmax = 0
        while len(spherical.coefficient_names(nmax, source)) < len(cols):
            nmax += 1
        names = spherical.coefficient_names(nmax, source)
        if sorted(names) != sorted(cols):
            raise BadParameter(
                f"the coefficient table's {source} columns {', '.join(cols)} are not a full set "
                f"to one degree (expected {', '.join(names)})",
                hint="use a table made by coefficient_table",
            )
        out.append((nmax, names))
    return out


def _as_ns(values: ArrayLike) -> np.ndarray:
    """Timezone-naive datetime64[ns] (UTC) from datetimes or ISO strings."""
    series = pd.to_datetime(pd.Series(np.asarray(values).ravel()), utc=True, errors="coerce")
    return series.dt.tz_localize(None).to_numpy(dtype="datetime64[ns]")


def external_field_at(
    coefficients_table: pd.DataFrame,
    longitude: ArrayLike,
    latitude: ArrayLike,
    height: ArrayLike,
    time: ArrayLike,
    *,
    include_induced: bool = True,
    max_gap_s: float = 180.0,
) -> np.ndarray:
    """Total-field variation of the fitted external (plus induced) field at a site.

    The external Gauss coefficients (``q``, ``s``) and, with ``include_induced``, the internal
    ones (``g``, ``h``: fitted to the disturbance after the main field was removed, so they are
    the induced part) of a coefficient table are interpolated linearly in time and synthesised
    at the site (:mod:`potfield.fields.harmonic.spherical`; Chapman and Bartels 1940; Olsen, Glassmeier
    and Jia 2010, Space Sci. Rev. 152:135). The vector is projected onto the IGRF-14 direction
    at the site and time: ``dF = b . F / |F|``, the first-order change of the total intensity
    (valid while ``|b| << |F|``; Blakely 1995, sec. 12.1, for the total-field anomaly as a
    projection). This is a remote reference for the diurnal correction of a survey without a
    base magnetometer; its accuracy falls with distance from the stations and with the degrees
    fitted (short-wavelength external fields, e.g. auroral and equatorial electrojets, are not
    in a low-degree model).

    Parameters
    ----------
    coefficients_table : pandas.DataFrame
        ``time`` (datetime64 or ISO 8601 text, UTC) and coefficient columns ``g10, g11, h11,
        ..., q10, q11, s11, ...`` (nT), as written by the separate stage (tables/coefficients.csv).
    longitude, latitude, height : float or array_like
        Geodetic site position(s) (degrees, m above the ellipsoid); broadcast with ``time``
        (a fixed site or a moving platform).
    time : array_like
        datetime64 (UTC) or ISO strings.
    include_induced : bool
        Add the internal (induced) coefficients' field.
    max_gap_s : float
        Times inside a gap longer than this (s) between coefficient epochs, or outside the
        table's time range, give NaN.

    Returns
    -------
    numpy.ndarray
        Total-field variation (nT) of the broadcast shape of the inputs.
    """
    from ..magnetic.igrf import igrf

    if "time" not in coefficients_table.columns:
        raise BadParameter(
            "the coefficient table has no 'time' column", hint="use a table made by coefficient_table"
        )
    (ni, int_names), (ne, ext_names) = _split_names(coefficients_table.columns)
    if ne == 0:
        raise BadParameter(
            "the coefficient table has no external (q, s) coefficients",
            hint="fit with an external degree >= 1",
        )
    t_stamp = _as_ns(coefficients_table["time"])
    t_ok = ~np.isnat(t_stamp)
    t_table = t_stamp.astype("int64").astype(float)
    lon, lat, hgt, times = np.broadcast_arrays(
        np.asarray(longitude, dtype=float),
        np.asarray(latitude, dtype=float),
        np.asarray(height, dtype=float),
        np.asarray(time),
    )
    shape = lon.shape
    t_req = _as_ns(times.ravel())
    t_val = t_req.astype("int64").astype(float)
    t_val[np.isnat(t_req)] = np.nan
    lon, lat, hgt = lon.ravel(), lat.ravel(), hgt.ravel()
    result = np.zeros(lon.size)
    used = [(ne, ext_names, "external")]
    if include_induced and ni:
        used.append((ni, int_names, "internal"))
    for nmax, names, source in used:  # two sources at most
        values = coefficients_table[names].to_numpy(dtype=float)
        rows = t_ok & np.all(np.isfinite(values), axis=1)
        if rows.sum() < 1:
            raise NotEnoughData("the coefficient table has no epoch with finite coefficients")
        tt, vv = t_table[rows], values[rows]
        order = np.argsort(tt)
        tt, vv = tt[order], vv[order]
        coefs = np.column_stack([np.interp(t_val, tt, vv[:, j]) for j in range(vv.shape[1])])
        pos = np.clip(np.searchsorted(tt, t_val), 1, max(tt.size - 1, 1))
        on_epoch = np.isin(t_val, tt)
        bad = ~np.isfinite(t_val) | (t_val < tt[0]) | (t_val > tt[-1])
        if tt.size > 1:
            bad |= ~on_epoch & (tt[pos] - tt[pos - 1] > max_gap_s * 1e9)
        coefs[bad] = np.nan
        gn, ge, gd = spherical.geodetic_design_matrices(lon, lat, hgt, nmax, source)
        b = np.stack([np.einsum("pk,pk->p", coefs, g) for g in (gn, ge, gd)])
        if source == "external":
            vector = b
        else:
            vector = vector + b
    good_t = np.isfinite(t_val)
    field_dir = np.full((3, lon.size), np.nan)
    if good_t.any():
        main = igrf(lon[good_t], lat[good_t], hgt[good_t], t_req[good_t])
        field_dir[:, good_t] = np.stack([main.north, main.east, main.down]) / main.total
    result = np.sum(vector * field_dir, axis=0)
    return result.reshape(shape)


def nearest_station(
    station_longitude: ArrayLike, station_latitude: ArrayLike, longitude: float, latitude: float
) -> tuple[int, float]:
    """Index and great-circle distance (km) of the station nearest to a site (haversine on a
    sphere of radius 6371.2 km; common practice)."""
    slon, slat = (
        np.radians(np.asarray(station_longitude, dtype=float)),
        np.radians(np.asarray(station_latitude, dtype=float)),
    )
    lon, lat = np.radians(float(longitude)), np.radians(float(latitude))
    a = np.sin((slat - lat) / 2) ** 2 + np.cos(slat) * np.cos(lat) * np.sin((slon - lon) / 2) ** 2
    dist = 2 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(a, 0, 1)))
    i = int(np.argmin(dist))
    return i, float(dist[i])


def remote_reference_caution(stations: pd.DataFrame, longitude: float, latitude: float) -> str:
    """The caution a report should carry when a diurnal correction uses :func:`external_field_at`.

    Parameters
    ----------
    stations : pandas.DataFrame
        ``station``, ``longitude``, ``latitude`` of the network's stations (e.g. the
        ``station_residuals`` table of the separate stage).
    longitude, latitude : float
        The survey site (e.g. its centroid), degrees.

    Returns
    -------
    str
        One line naming the nearest station, its distance and latitude difference.
    """
    i, dist = nearest_station(stations["longitude"], stations["latitude"], longitude, latitude)
    row = stations.iloc[i]
    dlat = float(latitude) - float(row["latitude"])
    return (
        f"Diurnal correction from a spherical-harmonic model of the observatory network "
        f"(remote reference), not a local base: nearest station {row['station']} is "
        f"{dist:.0f} km away with a latitude difference of {dlat:+.1f} deg; external fields "
        "shorter than the model's degrees (e.g. electrojets, local induction) are not "
        "represented, so check the levelling misclosures before relying on it."
    )
