"""Tiled equivalent-source gridding for surveys too large for one fit.

The survey region is cut into a regular array of rectangular *cores*. Each core is widened by
``overlap`` on every side into a *fit window*; the equivalent sources of every window are fitted
independently (:func:`potfield.fields.harmonic.eqsources.fit_equivalent_sources`) as Dask tasks, and each
window predicts the output grid only where its blending weight is non-zero: its core widened by
``overlap / 2``. The outer half of the overlap therefore holds data that steady the window's fit
but whose edge-affected predictions are never used.

Blending is a partition of unity built from one-dimensional cosine steps. Along easting, with
core boundaries ``b_0 < b_1 < ... < b_K`` and ramp half-width ``h = overlap / 2``,

    phi_k(x) = S((x - b_k) / h) - S((x - b_{k+1}) / h),
    S(t) = 0 for t <= -1, (1 + sin(pi t / 2)) / 2 for |t| < 1, 1 for t >= 1,

with ``S = 1`` at the first boundary and ``S = 0`` at the last (so the outer tiles reach to
infinity). The sum over k telescopes to exactly 1, every phi_k is non-negative (S is monotone)
and smooth (C1). The two-dimensional weights are products ``phi_k(x) psi_l(y)``, which again sum
to 1. The taper is the raised-cosine (Tukey) window (Harris 1978, Proc. IEEE 66:51); blending
overlapping local equivalent-source fits is the windowed approach of Soler and Uieda (2021,
GJI 227:1768), who fit windows in sequence (gradient boosting) where here they are fitted
independently and blended, which lets the windows run in parallel on a cluster.

References
----------
Dampney, C. N. G. (1969). The equivalent source technique. Geophysics, 34(1), 39-53.
Harris, F. J. (1978). On the use of windows for harmonic analysis with the discrete Fourier
transform. Proceedings of the IEEE, 66(1), 51-83.
Soler, S. R., and Uieda, L. (2021). Gradient-boosted equivalent sources. Geophysical Journal
International, 227(3), 1768-1783.
"""

from __future__ import annotations

import os
import sys
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr
from numpy.typing import ArrayLike

from ...io.grids import make_grid
from .._numerics import nearest_neighbour_distances
from ..errors import BadParameter, NotEnoughData

__all__ = [
    "TiledGrid",
    "cosine_step",
    "tile_boundaries",
    "tile_windows",
    "axis_weights",
    "tile_axis_weight",
    "blend_weights",
    "fit_tiled",
    "grid_tiled",
]

#: Fewest usable data a fit window needs; windows with fewer are left out and the weights of
#: the others are renormalised (their cells lie far from data; the grid stage masks them).
MIN_WINDOW_DATA = 20


# ------------------------------------------------------------------------------------------------
# geometry and weights
# ------------------------------------------------------------------------------------------------
def cosine_step(t: ArrayLike) -> np.ndarray:
    """Smooth step S(t): 0 for t <= -1, (1 + sin(pi t / 2)) / 2 in between, 1 for t >= 1.

    The raised-cosine (Tukey) transition (Harris 1978, Proc. IEEE 66:51); S(t) + S(-t) = 1.
    """
    t = np.clip(np.asarray(t, dtype=float), -1.0, 1.0)
    return 0.5 * (1.0 + np.sin(0.5 * np.pi * t))


def tile_boundaries(start: float, stop: float, tile_size: float) -> np.ndarray:
    """Core boundaries along one axis: ``ceil((stop - start) / tile_size)`` equal cores.

    Parameters
    ----------
    start, stop : float
        Axis limits (m).
    tile_size : float
        Largest core width (m).

    Returns
    -------
    numpy.ndarray
        ``K + 1`` ascending boundaries from ``start`` to ``stop``.
    """
    if not tile_size > 0:
        raise BadParameter(f"tile_size must be positive, not {tile_size}")
    count = max(1, int(np.ceil((stop - start) / tile_size - 1e-9)))
    return np.linspace(start, stop, count + 1)


def _step_row(x, bounds, k, ramp):
    """S((x - b_k) / h) with S = 1 at the first boundary and 0 at the last."""
    if k == 0:
        return np.ones_like(x)
    if k == bounds.size - 1:
        return np.zeros_like(x)
    if ramp > 0:
        return cosine_step((x - bounds[k]) / ramp)
    return (x >= bounds[k]).astype(float)


def tile_axis_weight(coordinate: ArrayLike, bounds: tuple[float, float], k: int, ramp: float) -> np.ndarray:
    """Weight ``phi_k`` of core ``k`` along one axis at ``coordinate`` (module docstring)."""
    x = np.asarray(coordinate, dtype=float)
    bounds = np.asarray(bounds, dtype=float)
    return _step_row(x, bounds, k, ramp) - _step_row(x, bounds, k + 1, ramp)


def axis_weights(coordinate: ArrayLike, bounds: list[tuple[float, float]], ramp: float) -> np.ndarray:
    """Partition-of-unity weights of the cores along one axis (module docstring).

    Parameters
    ----------
    coordinate : array
        Positions (m) along the axis.
    bounds : array
        Core boundaries (from :func:`tile_boundaries`).
    ramp : float
        Half-width ``h`` of the cosine transition (m); 0 gives sharp (0/1) weights.

    Returns
    -------
    numpy.ndarray
        Shape ``(len(bounds) - 1, len(coordinate))``; the columns sum to 1.
    """
    x = np.asarray(coordinate, dtype=float).ravel()
    bounds = np.asarray(bounds, dtype=float)
    return np.stack([tile_axis_weight(x, bounds, k, ramp) for k in range(bounds.size - 1)])


@dataclass
class _Window:
    row: int
    col: int
    #: (west, east, south, north) of the core, the fit window and the blending support.
    core: tuple
    fit: tuple
    support: tuple


def tile_windows(
    region: tuple[float, float, float, float], tile_size: float, overlap: float
) -> list[_Window]:
    """The tiles of ``region``: core, fit window (core + overlap) and blending support
    (core + overlap / 2), row by row from the south-west.

    Parameters
    ----------
    region : (west, east, south, north)
    tile_size, overlap : float
        Largest core width and the widening of each core into its fit window (m).
    """
    west, east, south, north = (float(v) for v in region)
    bx = tile_boundaries(west, east, tile_size)
    by = tile_boundaries(south, north, tile_size)
    half = 0.5 * overlap
    windows = []
    for j in range(by.size - 1):  # loop over tile rows
        for i in range(bx.size - 1):
            core = (bx[i], bx[i + 1], by[j], by[j + 1])
            fit = (core[0] - overlap, core[1] + overlap, core[2] - overlap, core[3] + overlap)
            # Outer tiles keep full weight beyond the region; their support is the fit window.
            support = (
                core[0] - half if i > 0 else -np.inf,
                core[1] + half if i < bx.size - 2 else np.inf,
                core[2] - half if j > 0 else -np.inf,
                core[3] + half if j < by.size - 2 else np.inf,
            )
            windows.append(_Window(j, i, core, fit, support))
    return windows


def blend_weights(
    easting: ArrayLike,
    northing: ArrayLike,
    region: tuple[float, float, float, float],
    tile_size: float,
    overlap: float,
) -> np.ndarray:
    """Blending weight of every tile at points (separable cosine partition of unity).

    Parameters
    ----------
    easting, northing : arrays of equal shape
        Points (m).
    region, tile_size, overlap
        As :func:`tile_windows`.

    Returns
    -------
    numpy.ndarray
        Shape ``(n_tiles,) + easting.shape`` in the order of :func:`tile_windows`; non-negative
        and summing to 1 over the tiles at every point.
    """
    e = np.asarray(easting, dtype=float)
    n = np.asarray(northing, dtype=float)
    west, east, south, north = (float(v) for v in region)
    wx = axis_weights(e.ravel(), tile_boundaries(west, east, tile_size), 0.5 * overlap)
    wy = axis_weights(n.ravel(), tile_boundaries(south, north, tile_size), 0.5 * overlap)
    weights = (wy[:, None, :] * wx[None, :, :]).reshape(-1, e.size)
    return weights.reshape((-1,) + e.shape)


# ------------------------------------------------------------------------------------------------
# one window (runs as a Dask task)
# ------------------------------------------------------------------------------------------------
def _fit_window(e, n, u, d, w, grid_e, grid_n, grid_h, points, fit_kwargs):
    """Fit one window and predict its sub-grid and, optionally, its support's data points."""
    from .eqsources import fit_equivalent_sources

    model = fit_equivalent_sources(e, n, u, d, weights=w, **fit_kwargs)
    ge, gn = np.meshgrid(grid_e, grid_n)
    gh = np.broadcast_to(grid_h, ge.shape)
    sub = model.predict((ge, gn, gh))
    at_points = None
    if points is not None:
        at_points = model.predict(points) if points[0].size else np.empty(0)
    info = {
        "data": int(d.size),
        "sources": model.n_sources,
        "method": model.method,
        "iterations": model.info.get("iterations"),
        "converged": model.info.get("converged"),
    }
    return sub, at_points, info


def _default_depth(e: np.ndarray, n: np.ndarray, sample: int = 200_000, seed: int = 0) -> float:
    """4.5 x the mean nearest-neighbour distance (harmonica's default; Soler and Uieda 2021),
    from at most ``sample`` points drawn at random (their neighbours searched among all)."""
    pick = None
    if len(e) > sample:
        pick = np.random.default_rng(seed).choice(len(e), sample, replace=False)
    return 4.5 * float(np.mean(nearest_neighbour_distances(e, n, points=pick)))


def _active_client(client):
    if client is not None:
        return client
    if "distributed" not in sys.modules:  # never imported: no Client can be active
        return None
    from distributed import default_client

    try:
        return default_client()
    except ValueError:
        return None


# ------------------------------------------------------------------------------------------------
# public API
# ------------------------------------------------------------------------------------------------
@dataclass
class TiledGrid:
    """Result of :func:`fit_tiled`.

    Attributes
    ----------
    grid : xarray.DataArray
        Blended prediction, dims ``("northing", "easting")`` ascending.
    residual : numpy.ndarray or None
        ``data - blended prediction`` at every datum (NaN for data that were not used: NaN
        values, zero weights or points outside every fitted window); None when not asked for.
    tiles : pandas.DataFrame
        One row per tile: row, col, core and fit-window limits, data, sources, method, CG
        iterations, whether it was fitted.
    predicted : numpy.ndarray or None
        Blended prediction at the points given as ``at`` (NaN outside every fitted window);
        None when not asked for.
    """

    grid: xr.DataArray
    residual: np.ndarray | None
    tiles: pd.DataFrame = field(default_factory=pd.DataFrame)
    predicted: np.ndarray | None = None


def fit_tiled(
    easting: ArrayLike,
    northing: ArrayLike,
    upward: ArrayLike,
    data: ArrayLike,
    *,
    region: tuple[float, float, float, float],
    spacing: float,
    height: float,
    tile_size: float,
    overlap: float | None = None,
    depth: float | str = "default",
    damping: float = 1e-3,
    block_size: float | None = None,
    weights: ArrayLike | None = None,
    method: str = "auto",
    client: object = None,
    scheduler: str = "threads",
    max_pending: int | None = None,
    residuals: bool = False,
    at: tuple | None = None,
    name: str = "field",
    units: str = "",
    long_name: str = "equivalent-source grid (tiled)",
    fit_options: dict | None = None,
) -> TiledGrid:
    """Grid scattered potential-field data by tiled, blended equivalent sources on Dask.

    Parameters
    ----------
    easting, northing, upward, data : arrays
        Data positions (m; ``upward`` = height) and values. NaN values are ignored.
    region : (west, east, south, north)
        Output grid region (m); the tiles cut this region.
    spacing : float
        Output cell size (m); coordinates as ``verde.grid_coordinates(region, spacing=spacing)``
        (the same as :meth:`EquivalentSourceModel.grid`, so tiled and whole grids align).
    height : float or 2-D array (northing, easting)
        Grid height (m): constant or a drape surface on the output grid.
    tile_size : float
        Largest core width (m); each axis is cut into ``ceil(width / tile_size)`` equal cores.
    overlap : float, optional
        Widening of each core into its fit window (m), ``0 <= overlap < tile_size``. Default:
        ``max(2 x depth, tile_size / 8)``. Predictions are blended over ``overlap / 2`` on each
        side of a core boundary.
    depth : float or "default"
        Source depth (m), the same for all windows; ``"default"`` is 4.5 x the mean
        nearest-neighbour distance of all the data (Soler and Uieda 2021).
    damping : float
        Damping (see :func:`potfield.fields.harmonic.eqsources.fit_equivalent_sources`).
    block_size : float, optional
        Source block / lattice spacing (m); default ``spacing``.
    weights : array, optional
        Data weights (e.g. 1 / sigma^2).
    method : {"auto", "dense", "fft"}
        Equivalent-source solver of every window.
    client : distributed.Client, optional
        Run the windows on this cluster; default: the active Client if there is one, else
        ``dask.compute`` with ``scheduler``.
    scheduler : {"threads", "processes", "synchronous"}
        Local Dask scheduler used when there is no Client.
    max_pending : int, optional
        Most windows whose data are in flight at once (bounds memory: a window's data are
        copied only when it is submitted). Default: 2 x the Client's threads, or 2 x the CPUs.
    residuals : bool
        Also evaluate the blended model at the data and return ``data - prediction``.
    at : tuple of 3 arrays, optional
        Other points ``(easting, northing, upward)`` (e.g. every raw reading) at which the
        blended model is evaluated (``TiledGrid.predicted``); with ``at``, ``residuals`` is
        ignored.
    name, units, long_name : str
        Attributes of the returned grid.
    fit_options : dict, optional
        Further keywords of every window's fit (``depth_type``, ``tol``, ``ceiling``, ...; see
        :func:`potfield.fields.harmonic.eqsources.fit_equivalent_sources`).

    Returns
    -------
    TiledGrid

    References
    ----------
    Dampney (1969) Geophysics 34:39; Soler and Uieda (2021) Geophys. J. Int. 227:1768;
    Harris (1978) Proc. IEEE 66:51 (cosine taper).
    """
    import dask
    import verde as vd

    e, n, u, d = (
        np.asarray(a, dtype=float).ravel() for a in np.broadcast_arrays(easting, northing, upward, data)
    )
    w = None if weights is None else np.asarray(weights, dtype=float).ravel()
    good = np.isfinite(e) & np.isfinite(n) & np.isfinite(u) & np.isfinite(d)
    if w is not None:
        if w.size != d.size:
            raise BadParameter("weights must have the same size as data")
        good &= np.isfinite(w) & (w > 0)
    if not good.any():
        raise NotEnoughData("no finite data to grid")
    if isinstance(depth, str):
        if depth != "default":
            raise BadParameter(f"depth must be a number or 'default', not '{depth}'")
        depth = _default_depth(e[good], n[good])
    depth = float(depth)
    tile_size = float(tile_size)
    if overlap is None:
        overlap = max(2.0 * depth, tile_size / 8.0)
    overlap = float(overlap)
    if not 0 <= overlap < tile_size:
        raise BadParameter(
            f"overlap ({overlap:g} m) must be >= 0 and smaller than tile_size ({tile_size:g} m)"
        )
    block_size = float(spacing) if block_size is None else float(block_size)
    fit_kwargs = {
        **(fit_options or {}),
        "depth": depth,
        "damping": float(damping),
        "block_size": block_size,
        "method": method,
    }

    ge2, gn2 = vd.grid_coordinates(tuple(region), spacing=spacing)
    grid_e, grid_n = ge2[0], gn2[:, 0]
    heights = np.broadcast_to(np.asarray(height, dtype=float), ge2.shape)

    windows = tile_windows(region, tile_size, overlap)
    west, east, south, north = (float(v) for v in region)
    bx = tile_boundaries(west, east, tile_size)
    by = tile_boundaries(south, north, tile_size)
    ramp = 0.5 * overlap
    wgx = axis_weights(grid_e, bx, ramp)  # (tiles along easting, nx)
    wgy = axis_weights(grid_n, by, ramp)

    idx = np.flatnonzero(good)
    # Points sorted by easting once: each window's selection is then a slice + mask.

    def selector(east, north, index):
        """Indices (from ``index``) of the points inside a window's fit region."""
        ordered = index[np.argsort(east[index], kind="stable")]
        sorted_east = east[ordered]

        def select(win):
            fw, fe, fs, fn = win.fit
            lo, hi = np.searchsorted(sorted_east, [fw, fe], side="left")
            cand = ordered[lo:hi]
            return cand[(north[cand] >= fs) & (north[cand] <= fn)]

        return select

    select = selector(e, n, idx)
    # where the blended model is evaluated besides the grid: other points, or the data
    if at is not None:
        pe, pn, pu = (np.asarray(a, dtype=float).ravel() for a in np.broadcast_arrays(*at[:3]))
        select_points = selector(pe, pn, np.flatnonzero(np.isfinite(pe) & np.isfinite(pn) & np.isfinite(pu)))
    else:
        pe, pn, pu = e, n, u
        select_points = select
    evaluate = residuals or at is not None

    plans, rows = [], []
    for win in windows:  # loop over tiles: cheap bookkeeping only, no data copied yet
        ix = np.flatnonzero(wgx[win.col] > 0)
        iy = np.flatnonzero(wgy[win.row] > 0)
        fw, fe, fs, fn = win.fit
        row = {
            "row": win.row,
            "col": win.col,
            "core_west": win.core[0],
            "core_east": win.core[1],
            "core_south": win.core[2],
            "core_north": win.core[3],
            "fit_west": fw,
            "fit_east": fe,
            "fit_south": fs,
            "fit_north": fn,
            "data": int(select(win).size),
            "fitted": False,
        }
        rows.append(row)
        if row["data"] < MIN_WINDOW_DATA or ix.size == 0 or iy.size == 0:
            continue
        plans.append((win, slice(iy[0], iy[-1] + 1), slice(ix[0], ix[-1] + 1), row))

    total = np.zeros(ge2.shape)
    wsum = np.zeros(ge2.shape)
    if evaluate:
        pred = np.zeros(pe.size)
        pred_w = np.zeros(pe.size)
    pending_points: dict[int, tuple] = {}

    def arguments(k):
        """The task arguments of plan ``k`` (data copied only when the task is submitted)."""
        win, ys, xs, _ = plans[k]
        sel = select(win)
        points = None
        if evaluate:
            sel_p = select_points(win)
            wp = tile_axis_weight(pe[sel_p], bx, win.col, ramp) * tile_axis_weight(
                pn[sel_p], by, win.row, ramp
            )
            keep = wp > 0
            pts_idx = sel_p[keep]
            pending_points[k] = (pts_idx, wp[keep])
            points = (pe[pts_idx], pn[pts_idx], pu[pts_idx])
        return (
            e[sel],
            n[sel],
            u[sel],
            d[sel],
            None if w is None else w[sel],
            grid_e[xs],
            grid_n[ys],
            np.ascontiguousarray(heights[ys, xs]),
            points,
        )

    def absorb(k, result):
        sub, at_points, info = result
        win, ys, xs, row = plans[k]
        wt = wgy[win.row, ys][:, None] * wgx[win.col, xs][None, :]
        total[ys, xs] += wt * sub
        wsum[ys, xs] += wt
        if evaluate:
            pts_idx, wp = pending_points.pop(k)
            pred[pts_idx] += wp * at_points  # indices are unique within a window
            pred_w[pts_idx] += wp
        row.update(info)
        row["fitted"] = True

    active = _active_client(client)
    if active is not None:
        from distributed import as_completed

        if max_pending is None:
            max_pending = 2 * max(1, sum(active.nthreads().values()))
        futures: dict = {}
        queue = as_completed()
        nxt = 0
        while nxt < len(plans) or futures:  # loop over tiles, at most max_pending in flight
            while nxt < len(plans) and len(futures) < max_pending:
                # hash=False: windows in one grid column share identical coordinate arrays;
                # content-hashed keys would be shared and freed under another window's task
                arrays = active.scatter(list(arguments(nxt)), direct=False, hash=False)
                future = active.submit(_fit_window, *arrays, fit_kwargs, pure=False)
                futures[future] = nxt
                queue.add(future)
                nxt += 1
            future = next(queue)
            absorb(futures.pop(future), future.result())
            future.release()
    else:
        if max_pending is None:
            max_pending = 2 * (os.cpu_count() or 1)
        for start in range(0, len(plans), max_pending):  # loop over batches of tiles
            batch = range(start, min(start + max_pending, len(plans)))
            delayed = [dask.delayed(_fit_window, pure=False)(*arguments(k), fit_kwargs) for k in batch]
            for k, result in zip(batch, dask.compute(*delayed, scheduler=scheduler)):
                absorb(k, result)

    # Renormalise where a window was left out (too few data); where none covers a cell: NaN.
    with np.errstate(invalid="ignore", divide="ignore"):
        values = np.where(wsum > 1e-12, total / wsum, np.nan)
    history = (
        f"tiled equivalent sources: {len(plans)} windows, tile {tile_size:g} m, overlap "
        f"{overlap:g} m, depth {depth:g} m, damping {damping:g}, block {block_size:g} m"
    )
    grid = make_grid(grid_e, grid_n, values, name=name, units=units, long_name=long_name, history=history)
    grid.attrs.update(
        {
            "tile_size_m": tile_size,
            "overlap_m": overlap,
            "depth_m": depth,
            "damping": float(damping),
            "block_size_m": block_size,
            "windows": len(plans),
        }
    )
    residual = predicted = None
    if evaluate:
        predicted = np.full(pe.size, np.nan)
        ok = pred_w > 1e-12
        predicted[ok] = pred[ok] / pred_w[ok]
        if at is None:
            residual = d - predicted
            predicted = None
    return TiledGrid(grid=grid, residual=residual, tiles=pd.DataFrame(rows), predicted=predicted)


def grid_tiled(
    easting: ArrayLike,
    northing: ArrayLike,
    upward: ArrayLike,
    data: ArrayLike,
    *,
    region: tuple[float, float, float, float],
    spacing: float,
    height: float,
    tile_size: float,
    overlap: float | None = None,
    depth: float | str = "default",
    damping: float = 1e-3,
    block_size: float | None = None,
    client: object = None,
    **kwargs: object,
) -> xr.DataArray:
    """Tiled, blended equivalent-source grid (the grid of :func:`fit_tiled`).

    Parameters and references as :func:`fit_tiled` (extra keywords are passed on to it).

    Returns
    -------
    xarray.DataArray
        Dims ``("northing", "easting")``, both ascending.
    """
    kwargs.pop("residuals", None)
    return fit_tiled(
        easting,
        northing,
        upward,
        data,
        region=region,
        spacing=spacing,
        height=height,
        tile_size=tile_size,
        overlap=overlap,
        depth=depth,
        damping=damping,
        block_size=block_size,
        client=client,
        residuals=False,
        **kwargs,
    ).grid
