"""Numba kernels of the equivalent-source solvers, and the holders that feed them.

The hot loops take plain arrays and scalars (what numba compiles fastest); the Python side
passes them grouped in small named tuples, unpacked here at the numba boundary:

- :class:`Points`: positions of readings or prediction points.
- :class:`LevelGrid`: a horizontal lattice with its height levels and the order of the Lagrange
  interpolation (where every point's interpolation stencil lies).
- :class:`Stencils`: every point's stencil origin and interpolation weights, stored compactly.
- :class:`NearField`: the lattice sources as the exact near-field correction sees them.

Each ``_kernel`` has a thin wrapper without the underscore that takes these holders.
"""

from __future__ import annotations

from typing import NamedTuple

import numba
import numpy as np


class Points(NamedTuple):
    """Point positions (m), flat float64 arrays of equal size."""

    easting: np.ndarray
    northing: np.ndarray
    upward: np.ndarray


class LevelGrid(NamedTuple):
    """Horizontal lattice ``(x0 + i dx, y0 + j dx)``, ``nx`` by ``ny`` nodes, at the heights
    ``levels``, interpolated with ``order`` nodes per horizontal axis."""

    levels: np.ndarray
    x0: float
    y0: float
    dx: float
    nx: int
    ny: int
    order: int


class Stencils(NamedTuple):
    """Per point: stencil origin ``base[i] = (column, row)`` and the Lagrange weights along
    easting ``wx[i]``, northing ``wy[i]`` and height ``wz[i]`` (one per level)."""

    base: np.ndarray
    wx: np.ndarray
    wy: np.ndarray
    wz: np.ndarray


class NearField(NamedTuple):
    """Lattice sources for the near-field correction: source number at each node ``src_id``
    (ny, nx; -1 = none), source heights ``src_z``, their weights on the source planes ``src_v``,
    the cored lattice kernel ``table[level, oy + reach, ox + reach, plane]``, the kernel
    ``scale`` and the half-width ``half`` (cells) of the exact near field."""

    src_id: np.ndarray
    src_z: np.ndarray
    src_v: np.ndarray
    table: np.ndarray
    reach: int
    scale: float
    half: int


@numba.njit(cache=True)
def _lagrange_unit(t, order, out):
    """Lagrange weights of nodes 0..order-1 at local coordinate t."""
    for k in range(order):
        w = 1.0
        for m in range(order):
            if m != k:
                w *= (t - m) / (k - m)
        out[k] = w


@numba.njit(cache=True)
def _lagrange_nodes(z, nodes, out):
    """Lagrange weights of arbitrary 1-D nodes at z (one node: weight 1)."""
    count = nodes.size
    for k in range(count):
        w = 1.0
        for m in range(count):
            if m != k:
                w *= (z - nodes[m]) / (nodes[k] - nodes[m])
        out[k] = w


@numba.njit(cache=True)
def _stencil_base(frac, n, order):
    base = int(np.floor(frac)) - (order // 2 - 1)
    base = max(base, 0)
    base = min(base, n - order)
    return base


@numba.njit(cache=True)
def _point_stencil(ei, ni, ui, zl, x0, y0, dx, nx, ny, order):
    """Lattice coordinates, stencil origin and Lagrange weights of one point.

    Returns ``(fx, fy, bx, by, wx, wy, wz)``: the point's fractional lattice column and row, the
    first column and row of its ``order`` x ``order`` stencil, and the interpolation weights
    along easting (``order``), northing (``order``) and height (one per level of ``zl``).
    """
    wx = np.empty(order)
    wy = np.empty(order)
    wz = np.empty(zl.size)
    fx = (ei - x0) / dx
    fy = (ni - y0) / dx
    bx = _stencil_base(fx, nx, order)
    by = _stencil_base(fy, ny, order)
    _lagrange_unit(fx - bx, order, wx)
    _lagrange_unit(fy - by, order, wy)
    _lagrange_nodes(ui, zl, wz)
    return fx, fy, bx, by, wx, wy, wz


@numba.njit(parallel=True, cache=True)
def _direct_sum(e, n, u, se, sn, su, coefs, scale, out):
    """out_i = sum_j coefs_j * scale / |x_i - s_j| (exact forward sum)."""
    for i in numba.prange(e.size):
        acc = 0.0
        for j in range(se.size):
            dx = e[i] - se[j]
            dy = n[i] - sn[j]
            dz = u[i] - su[j]
            acc += coefs[j] / np.sqrt(dx * dx + dy * dy + dz * dz)
        out[i] = acc * scale


@numba.njit(parallel=True, cache=True)
def _dense_jacobian(e, n, u, se, sn, su, scale, jac):
    for i in numba.prange(e.size):
        for j in range(se.size):
            dx = e[i] - se[j]
            dy = n[i] - sn[j]
            dz = u[i] - su[j]
            jac[i, j] = scale / np.sqrt(dx * dx + dy * dy + dz * dz)


@numba.njit(parallel=True, cache=True)
def _stencils(e, n, u, zl, x0, y0, dx, nx, ny, order, base, wx, wy, wz):
    """Stencil origin (column, row) and Lagrange weights of every point, stored compactly."""
    for i in numba.prange(e.size):
        _, _, bx, by, px, py, pz = _point_stencil(e[i], n[i], u[i], zl, x0, y0, dx, nx, ny, order)
        base[i, 0] = bx
        base[i, 1] = by
        wx[i] = px
        wy[i] = py
        wz[i] = pz


@numba.njit(parallel=True, cache=True)
def _gather(levels, base, wx, wy, wz, sw, out):
    """out_i = sw_i * (interpolation of the level grids at point i)."""
    for i in numba.prange(base.shape[0]):
        out[i] = sw[i] * _interpolate(levels, 0, 0, base[i, 0], base[i, 1], wx[i], wy[i], wz[i])


@numba.njit(cache=True)
def _chunk(t, chunks, size):
    """Rows ``[start, stop)`` of chunk ``t`` of ``chunks`` equal chunks of ``size`` rows (the
    scatter kernels give each chunk its own output buffer, so parallel writes never collide)."""
    step = (size + chunks - 1) // chunks
    return t * step, min(size, (t + 1) * step)


@numba.njit(parallel=True, cache=True)
def _scatter(r, base, wx, wy, wz, sw, buffers):
    """Adjoint of :func:`_gather`: buffers[t] += interpolation weights * sw_i r_i, one buffer
    per chunk of points (no write races); the caller sums the buffers."""
    chunks = buffers.shape[0]
    nlev = buffers.shape[1]
    order = wx.shape[1]
    for t in numba.prange(chunks):
        buf = buffers[t]
        buf[:] = 0.0
        start, stop = _chunk(t, chunks, base.shape[0])
        for i in range(start, stop):
            bx = base[i, 0]
            by = base[i, 1]
            ri = sw[i] * r[i]
            for lev in range(nlev):
                rl = ri * wz[i, lev]
                for a in range(order):
                    ra = rl * wy[i, a]
                    for b in range(order):
                        buf[lev, by + a, bx + b] += ra * wx[i, b]


@numba.njit(parallel=True, cache=True)
def _near_gather(cols, vals, c, out):
    """out_i += sum_k vals[i, k] c[cols[i, k]] (fixed-width near-field rows; col -1 = none)."""
    for i in numba.prange(cols.shape[0]):
        acc = 0.0
        for k in range(cols.shape[1]):
            j = cols[i, k]
            if j >= 0:
                acc += vals[i, k] * c[j]
        out[i] += acc


@numba.njit(parallel=True, cache=True)
def _near_scatter(cols, vals, r, buffers):
    """Adjoint of :func:`_near_gather` into one buffer per chunk of rows."""
    chunks = buffers.shape[0]
    for t in numba.prange(chunks):
        buf = buffers[t]
        buf[:] = 0.0
        start, stop = _chunk(t, chunks, cols.shape[0])
        for i in range(start, stop):
            ri = r[i]
            for k in range(cols.shape[1]):
                j = cols[i, k]
                if j >= 0:
                    buf[j] += vals[i, k] * ri


@numba.njit(parallel=True, cache=True)
def _schwarz_apply(s, src, src_off, fac, fac_off, buffers):
    """buffers[t] += sum over the windows of chunk t of R_i^T M_i^-1 R_i s, by forward and back
    substitution with the Cholesky factors ``M_i = L_i L_i^T`` (lower triangles packed by rows
    from ``fac[fac_off[i]]``) of the windows' sources ``src[src_off[i]:src_off[i+1]]``; one
    buffer per chunk of windows (no write races); the caller sums the buffers."""
    chunks = buffers.shape[0]
    for t in numba.prange(chunks):
        buf = buffers[t]
        buf[:] = 0.0
        start, stop = _chunk(t, chunks, src_off.size - 1)
        for b in range(start, stop):
            lo = src_off[b]
            m = src_off[b + 1] - lo
            y = np.empty(m)
            for i in range(m):  # L y = s
                row = fac_off[b] + i * (i + 1) // 2
                acc = s[src[lo + i]]
                for k in range(i):
                    acc -= fac[row + k] * y[k]
                y[i] = acc / fac[row + i]
            for i in range(m - 1, -1, -1):  # L^T x = y, row by row of L
                row = fac_off[b] + i * (i + 1) // 2
                xi = y[i] / fac[row + i]
                y[i] = xi
                for k in range(i):
                    y[k] -= fac[row + k] * xi
            for i in range(m):
                buf[src[lo + i]] += y[i]


@numba.njit(cache=True)
def _near_value(ei, ni, ui, px, py, zsj, vpj, table, reach, wz, wy, wx, bx, by, x0, y0, dx, order, scale):
    """Exact kernel minus its lattice interpolation, for one point and the source at lattice
    node (px, py), height ``zsj``, plane weights ``vpj``; ``table[l, oy, ox, p]`` holds the
    (scaled, cored) lattice kernel between level l and plane p at node offset (ox, oy) - reach."""
    ddx = ei - (x0 + px * dx)
    ddy = ni - (y0 + py * dx)
    ddz = ui - zsj
    exact = scale / np.sqrt(ddx * ddx + ddy * ddy + ddz * ddz)
    npl = vpj.size
    interp = 0.0
    for lev in range(wz.size):
        acc = 0.0
        for a in range(order):
            oy = by + a - py + reach
            row = 0.0
            for b in range(order):
                ox = bx + b - px + reach
                k = 0.0
                for p in range(npl):
                    k += vpj[p] * table[lev, oy, ox, p]
                row += wx[b] * k
            acc += wy[a] * row
        interp += wz[lev] * acc
    return exact - interp


@numba.njit(parallel=True, cache=True)
def _near_entries(
    e, n, u, zl, x0, y0, dx, nx, ny, order, src_id, src_z, src_v, table, reach, scale, half, sw, cols, vals
):
    """Near-field correction (exact minus interpolated kernel, times sw_i) of the sources in the
    (2 half + 1)^2 cells around every point; one fixed-width row per point, column -1 = empty."""
    for i in numba.prange(e.size):
        fx, fy, bx, by, wx, wy, wz = _point_stencil(e[i], n[i], u[i], zl, x0, y0, dx, nx, ny, order)
        ix = int(np.floor(fx + 0.5))
        iy = int(np.floor(fy + 0.5))
        k = 0
        for q in range(iy - half, iy + half + 1):
            for p in range(ix - half, ix + half + 1):
                j = -1
                if q >= 0 and q < ny and p >= 0 and p < nx:
                    j = src_id[q, p]
                cols[i, k] = j
                if j >= 0:
                    vals[i, k] = sw[i] * _near_value(
                        e[i],
                        n[i],
                        u[i],
                        p,
                        q,
                        src_z[j],
                        src_v[j],
                        table,
                        reach,
                        wz,
                        wy,
                        wx,
                        bx,
                        by,
                        x0,
                        y0,
                        dx,
                        order,
                        scale,
                    )
                else:
                    vals[i, k] = 0.0
                k += 1


@numba.njit(parallel=True, cache=True)
def _nearest_nodes(e, n, x0, y0, dx, nx, ny, out):
    """Number ``row * nx + column`` of the lattice node nearest to every point (clamped)."""
    for i in numba.prange(e.size):
        ix = min(max(int(np.floor((e[i] - x0) / dx + 0.5)), 0), nx - 1)
        iy = min(max(int(np.floor((n[i] - y0) / dx + 0.5)), 0), ny - 1)
        out[i] = iy * nx + ix


@numba.njit(parallel=True, cache=True)
def _predict_lattice(e, n, u, levels, zl, x0, y0, dx, order, out):
    """Interpolate the level grids to the points (no near field)."""
    nlev, ny, nx = levels.shape
    for i in numba.prange(e.size):
        _, _, bx, by, wx, wy, wz = _point_stencil(e[i], n[i], u[i], zl, x0, y0, dx, nx, ny, order)
        out[i] = _interpolate(levels, 0, 0, bx, by, wx, wy, wz)


@numba.njit(cache=True)
def _interpolate(grids, oy, ox, bx, by, wx, wy, wz):
    """Lagrange interpolation of ``grids[level, row - oy, column - ox]`` with a point's stencil."""
    order = wx.size
    val = 0.0
    for lev in range(wz.size):
        acc = 0.0
        for a in range(order):
            row = 0.0
            for b in range(order):
                row += wx[b] * grids[lev, by + a - oy, bx + b - ox]
            acc += wy[a] * row
        val += wz[lev] * acc
    return val


@numba.njit(parallel=True, cache=True)
def _predict_near(
    e, n, u, ranked, starts, levels, zl, x0, y0, dx, order, src_id, coefs, src_z, src_v, table, reach, scale,
    half, out
):  # fmt: skip
    """Interpolated level grids plus the exact near field, one group of points at a time.

    The points of a group share their nearest lattice node (``ranked[starts[g]:starts[g+1]]``),
    hence the same near sources. Their cored lattice field is formed once per group on the
    patch of nodes the group's stencils cover and taken off the level grids there; each point
    then interpolates the patch and adds the sources' exact field. Per point this is the sum
    ``interpolated levels + sum_j c_j (exact_j - interpolated cored kernel_j)`` of
    :func:`_near_value`, with the kernel interpolation done once per group instead of once per
    point and source (on the 1e6-reading demo, about 15 readings share a node).
    """
    nlev, ny, nx = levels.shape
    npl = src_v.shape[1]
    for g in numba.prange(starts.size - 1):
        lo = starts[g]
        hi = starts[g + 1]
        bx0, by0, bx1, by1 = nx, ny, -1, -1
        for k in range(lo, hi):
            i = ranked[k]
            bx = _stencil_base((e[i] - x0) / dx, nx, order)
            by = _stencil_base((n[i] - y0) / dx, ny, order)
            bx0, bx1 = min(bx0, bx), max(bx1, bx)
            by0, by1 = min(by0, by), max(by1, by)
        width = bx1 - bx0 + order
        height = by1 - by0 + order
        patch = levels[:, by0 : by0 + height, bx0 : bx0 + width].copy()
        first = ranked[lo]
        ix = min(max(int(np.floor((e[first] - x0) / dx + 0.5)), 0), nx - 1)
        iy = min(max(int(np.floor((n[first] - y0) / dx + 0.5)), 0), ny - 1)
        q0, q1 = max(iy - half, 0), min(iy + half + 1, ny)
        p0, p1 = max(ix - half, 0), min(ix + half + 1, nx)
        for q in range(q0, q1):
            for p in range(p0, p1):
                j = src_id[q, p]
                if j < 0:
                    continue
                cj = coefs[j]
                for lev in range(nlev):
                    for a in range(height):
                        oy = by0 + a - q + reach
                        for b in range(width):
                            ox = bx0 + b - p + reach
                            kernel = 0.0
                            for pl in range(npl):
                                kernel += src_v[j, pl] * table[lev, oy, ox, pl]
                            patch[lev, a, b] -= cj * kernel
        for k in range(lo, hi):
            i = ranked[k]
            _, _, bx, by, wx, wy, wz = _point_stencil(e[i], n[i], u[i], zl, x0, y0, dx, nx, ny, order)
            val = _interpolate(patch, by0, bx0, bx, by, wx, wy, wz)
            for q in range(q0, q1):
                for p in range(p0, p1):
                    j = src_id[q, p]
                    if j >= 0:
                        ddx = e[i] - (x0 + p * dx)
                        ddy = n[i] - (y0 + q * dx)
                        ddz = u[i] - src_z[j]
                        val += coefs[j] * scale / np.sqrt(ddx * ddx + ddy * ddy + ddz * ddz)
            out[i] = val


@numba.njit(parallel=True, cache=True)
def _mix_spectra(specs, spectra, adjoint, out):
    """out[k] = sum_m spectra[k, m] specs[m] (``adjoint``: spectra[m, k]), one pass."""
    count, rows, cols = out.shape
    for i in numba.prange(rows):
        for k in range(count):
            for j in range(cols):
                acc = 0j
                for m in range(specs.shape[0]):
                    weight = spectra[m, k, i, j] if adjoint else spectra[k, m, i, j]
                    acc += weight * specs[m, i, j]
                out[k, i, j] = acc


@numba.njit(parallel=True, cache=True)
def _plane_weights(zs, planes, out):
    """Lagrange weights of every source height on the source planes (one row per source)."""
    for j in numba.prange(zs.size):
        _lagrange_nodes(zs[j], planes, out[j])


# ------------------------------------------------------------------------------------------------
# wrappers: holders in, plain arrays to numba
# ------------------------------------------------------------------------------------------------
def stencils(points: Points, grid: LevelGrid) -> Stencils:
    """Stencil origins and interpolation weights of every point (see :class:`Stencils`)."""
    size = points.easting.size
    out = Stencils(
        np.empty((size, 2), dtype=np.int64),
        np.empty((size, grid.order)),
        np.empty((size, grid.order)),
        np.empty((size, grid.levels.size)),
    )
    _stencils(*points, *grid, *out)
    return out


def gather(levels: np.ndarray, st: Stencils, sw: np.ndarray, out: np.ndarray) -> None:
    """``out_i = sw_i * (interpolation of the level grids at point i)``."""
    _gather(levels, *st, sw, out)


def scatter(r: np.ndarray, st: Stencils, sw: np.ndarray, buffers: np.ndarray) -> None:
    """Adjoint of :func:`gather` into one buffer per chunk of points (the caller sums them)."""
    _scatter(r, *st, sw, buffers)


def near_entries(
    points: Points, grid: LevelGrid, near: NearField, sw: np.ndarray, cols: np.ndarray, vals: np.ndarray
) -> None:
    """Fixed-width rows of the near-field correction (times ``sw_i``) of every point."""
    _near_entries(*points, *grid, *near, sw, cols, vals)


def predict_lattice(
    points: Points,
    levels: np.ndarray,
    grid: LevelGrid,
    near: NearField,
    coefs: np.ndarray,
    with_near: bool,
    out: np.ndarray,
) -> None:
    """Interpolate the level grids (``levels``, shaped like ``grid``) to the points and, with
    ``with_near``, add the exact near field of the sources (points grouped by nearest node)."""
    if not with_near:
        _predict_lattice(*points, levels, grid.levels, grid.x0, grid.y0, grid.dx, grid.order, out)
        return
    nodes = np.empty(points.easting.size, dtype=np.int64)
    _nearest_nodes(points.easting, points.northing, grid.x0, grid.y0, grid.dx, grid.nx, grid.ny, nodes)
    ranked = np.argsort(nodes, kind="stable")
    nodes = nodes[ranked]
    starts = np.flatnonzero(np.diff(nodes)) + 1
    starts = np.concatenate(([0], starts, [nodes.size])).astype(np.int64)
    _predict_near(
        *points,
        ranked,
        starts,
        levels,
        grid.levels,
        grid.x0,
        grid.y0,
        grid.dx,
        grid.order,
        near.src_id,
        coefs,
        near.src_z,
        near.src_v,
        near.table,
        near.reach,
        near.scale,
        near.half,
        out,
    )
