"""Shared numerics of the physics modules, written once.

Four small operations recur across the field modules and the stages; each lives here, with a
test against an outside reference in ``tests/fields/test_numerics.py``:

- :func:`damped_lstsq`: damped (Tikhonov / ridge) least squares by the normal equations
  (:func:`normal_matrix` and :func:`solve_damped_normal` when one matrix serves many dampings).
- :func:`block_median` and :func:`group_median`: medians in square blocks / in groups.
- :func:`nearest_neighbour_distances` and :func:`median_spacing`: the data spacing of
  scattered points.
- :func:`sample_grid`: bilinear values of a (northing, easting) grid at points.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    import threadpoolctl
    import xarray as xr

__all__ = [
    "block_median",
    "damped_lstsq",
    "group_median",
    "median_spacing",
    "nearest_neighbour_distances",
    "normal_matrix",
    "sample_grid",
    "single_thread_blas",
    "solve_damped_normal",
]


def damped_lstsq(matrix: np.ndarray, rhs: np.ndarray, damping: float | np.ndarray) -> np.ndarray:
    """Solve ``min |A x - b|^2 + sum_j damping_j x_j^2`` by the damped normal equations.

    ``(A^T A + diag(damping)) x = A^T b`` is solved by Cholesky factorisation; if the matrix is
    not numerically positive definite (damping 0 on a rank-deficient ``A``) the minimum-norm
    least-squares solution of the normal equations is returned instead (Tikhonov
    regularisation; Aster, Borchers and Thurber 2013, Parameter Estimation and Inverse Problems,
    ch. 4). Weighted problems pass ``A`` and ``b`` already multiplied by ``sqrt(weights)``.

    Parameters
    ----------
    matrix : (N, M) array
        Design matrix ``A`` (not modified).
    rhs : (N,) array
        Data ``b``.
    damping : float or (M,) array
        Damping of each unknown (a scalar applies to all).

    Returns
    -------
    (M,) array
    """
    return solve_damped_normal(normal_matrix(matrix), matrix.T @ np.asarray(rhs, dtype=float), damping)


def normal_matrix(matrix: np.ndarray) -> np.ndarray:
    """``A^T A`` of a (N, M) design matrix, (M, M): the upper triangle by a symmetric rank-k
    update (BLAS syrk, half the work of a general product, no copy of a C-ordered ``A``),
    mirrored to the lower."""
    from scipy.linalg.blas import dsyrk

    # A^T of a C-ordered A is Fortran-ordered: syrk of (A^T)(A^T)^T reads it in place
    upper = dsyrk(1.0, np.asarray(matrix, dtype=float).T, trans=0, lower=0)
    full = upper + upper.T
    full[np.diag_indices_from(full)] = upper.diagonal()
    return full


def solve_damped_normal(normal: np.ndarray, rhs: np.ndarray, damping: float | np.ndarray) -> np.ndarray:
    """Solve ``(N + diag(damping)) x = rhs`` for a symmetric ``N = A^T A`` (not modified), by
    Cholesky, else the least-squares solution (see :func:`damped_lstsq`); one normal matrix
    serves many dampings."""

    def damped() -> np.ndarray:
        out = normal.copy()
        out[np.diag_indices_from(out)] += np.broadcast_to(np.asarray(damping, dtype=float), (out.shape[0],))
        return out

    try:
        return scipy.linalg.cho_solve(
            scipy.linalg.cho_factor(damped(), check_finite=False, overwrite_a=True), rhs, check_finite=False
        )
    except (np.linalg.LinAlgError, scipy.linalg.LinAlgError):
        return scipy.linalg.lstsq(damped(), rhs)[0]


def single_thread_blas() -> threadpoolctl.threadpool_limits:
    """Context in which BLAS/LAPACK run on one thread: for many small factorisations and products
    (preconditioner windows, cross-validation folds) between numba's parallel kernels. Threaded
    BLAS gains little on matrices of a few hundred rows, and when the machine is busy its
    threads wait for each other: a 529-row Cholesky took 55 ms on two threads under a load of
    3 on 2 cores, 3 ms on one (measured; the preconditioner factors ~1,500 of them)."""
    import threadpoolctl

    return threadpoolctl.threadpool_limits(limits=1, user_api="blas")


def group_median(values: np.ndarray, groups: np.ndarray, count: int) -> np.ndarray:
    """Median of ``values`` in each of ``count`` groups numbered 0 .. count-1 (none empty).

    One stable sort (O(N log N)); an even group's median is the mean of its two middle values,
    as numpy.median.
    """
    values = np.asarray(values, dtype=float)
    order = np.lexsort((values, groups))
    sorted_values = values[order]
    starts = np.searchsorted(np.asarray(groups)[order], np.arange(count))
    sizes = np.diff(np.r_[starts, values.size])
    return 0.5 * (sorted_values[starts + (sizes - 1) // 2] + sorted_values[starts + sizes // 2])


def block_median(
    easting: ArrayLike,
    northing: ArrayLike,
    upward: ArrayLike,
    data: ArrayLike,
    spacing: float,
    region: tuple[float, float, float, float] | None = None,
    stretch: bool = False,
) -> tuple[tuple[np.ndarray, np.ndarray, np.ndarray], np.ndarray]:
    """Median of the coordinates and the data in square blocks (vectorised, O(N log N)).

    Every coordinate and the data are replaced by their medians in each block of side
    ``spacing`` counted from the region's south-west corner (points on the east edge fall in the
    last column). With ``stretch`` the blocks are verde's: sides stretched so that a whole number
    of blocks (``round(width / spacing)``, at least one) spans the region along each axis, each
    point in the block of the nearest centre (``verde.block_split``), as
    ``verde.BlockReduce(numpy.median, spacing, drop_coords=False)`` does by default (Uieda 2018,
    JOSS 3:957). One stable sort per array replaces a per-block Python-level grouping.

    Parameters
    ----------
    easting, northing, upward, data : arrays
        Positions (m) and values, equal sizes.
    spacing : float
        Block side (m).
    region : (west, east, south, north), optional
        Default: the bounding box of the points.
    stretch : bool
        Stretch the blocks to fit the region exactly (see above).

    Returns
    -------
    (easting, northing, upward), data : numpy arrays
        One value per occupied block, ordered by block (rows south to north, columns west to
        east).
    """
    e, n, u, d = (np.asarray(a, dtype=float).ravel() for a in (easting, northing, upward, data))
    if region is None:
        region = (e.min(), e.max(), n.min(), n.max())
    west, east, south, north = (float(v) for v in region)
    if stretch:
        # verde's own block assignment (nearest block centre), so that points on a block edge
        # (gridded data) fall in the same block as with verde.BlockReduce
        from verde import block_split

        _, key = block_split((e, n), spacing=spacing, region=(west, east, south, north), adjust="spacing")
        key = np.asarray(key, dtype=np.int64)
    else:
        ncol = int(np.floor((east - west) / spacing)) + 1
        col = np.clip(np.floor((e - west) / spacing).astype(np.int64), 0, ncol - 1)
        row = np.floor((n - south) / spacing).astype(np.int64)
        key = row * ncol + col
    out = []
    starts = counts = None
    for values in (e, n, u, d):
        order = np.lexsort((values, key))
        ks, vs = key[order], values[order]
        if starts is None:
            starts = np.r_[0, np.flatnonzero(np.diff(ks)) + 1]
            counts = np.diff(np.r_[starts, ks.size])
        lower = starts + (counts - 1) // 2
        upper = starts + counts // 2
        out.append(0.5 * (vs[lower] + vs[upper]))
    return (out[0], out[1], out[2]), out[3]


def nearest_neighbour_distances(
    easting: ArrayLike, northing: ArrayLike, points: np.ndarray | None = None
) -> np.ndarray:
    """Horizontal distance (m) from each point to its nearest other point (a k-d tree query).

    Parameters
    ----------
    easting, northing : arrays
        The points (m).
    points : int array, optional
        Only these points' distances (their neighbours are searched among all points).

    Returns
    -------
    array
        One distance per (queried) point; empty with fewer than two points.
    """
    from scipy.spatial import cKDTree

    pts = np.column_stack([np.ravel(easting), np.ravel(northing)]).astype(float)
    if len(pts) < 2:
        return np.empty(0)
    query = pts if points is None else pts[points]
    dist, _ = cKDTree(pts).query(query, k=2)
    return dist[:, 1]


def median_spacing(easting: ArrayLike, northing: ArrayLike) -> float:
    """Median distance from each point to its nearest neighbour (m); NaN with fewer than two.

    Common practice for the data spacing of scattered stations; harmonica's default source depth
    is 4.5 times the mean of this distance (Soler and Uieda 2021, GJI 227:1768).
    """
    dist = nearest_neighbour_distances(easting, northing)
    return float(np.median(dist)) if dist.size else float("nan")


def sample_grid(grid: xr.DataArray, easting: ArrayLike, northing: ArrayLike) -> np.ndarray:
    """Bilinear values of a grid with dimensions ``northing`` and ``easting`` at points.

    NaN outside the grid and wherever a cell corner with non-zero weight is NaN (empty cells).
    Either axis may be descending.

    Parameters
    ----------
    grid : xarray.DataArray
    easting, northing : arrays
        Point coordinates (m), equal shapes.

    Returns
    -------
    array
        Flat array, one value per point.
    """
    from scipy.interpolate import RegularGridInterpolator

    grid = grid.transpose("northing", "easting")
    north = grid["northing"].to_numpy()
    east = grid["easting"].to_numpy()
    values = grid.to_numpy().astype(float)
    if north[0] > north[-1]:
        north, values = north[::-1], values[::-1]
    if east[0] > east[-1]:
        east, values = east[::-1], values[:, ::-1]
    interp = RegularGridInterpolator(
        (north, east), values, method="linear", bounds_error=False, fill_value=np.nan
    )
    pts = np.column_stack([np.ravel(np.asarray(northing, float)), np.ravel(np.asarray(easting, float))])
    return interp(pts)


def trailing_median(values: np.ndarray, groups: np.ndarray, width: int) -> np.ndarray:
    """Median of values[i - width + 1 .. i] within the same group (a line or a base session;
    NaN ignored), in the input order."""
    import pandas as pd

    series = pd.Series(values)
    return (
        series.groupby(groups, sort=False)
        .rolling(int(width), min_periods=1)
        .median()
        .reset_index(level=0, drop=True)
        .sort_index()
        .to_numpy()
    )
