"""Fitting equivalent sources: the dense solver, the lattice (FFT) problem with its
preconditioned CGLS solver, and the entry point :func:`fit_equivalent_sources`."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numba
import numpy as np

from ..._numerics import (
    block_median,
    median_spacing,
    nearest_neighbour_distances,
    normal_matrix,
    single_thread_blas,
    solve_damped_normal,
)
from ...errors import BadParameter, NotEnoughData
from .kernels import (
    LevelGrid,
    NearField,
    Points,
    _dense_jacobian,
    _near_gather,
    _near_scatter,
    _plane_weights,
    gather,
    near_entries,
    scatter,
    stencils,
)
from .lattice import (
    INTERP_ORDER,
    NEAR_CELLS,
    TABLE_REACH,
    Convolver,
    Lattice,
    capped,
    constant_plane,
    height_levels,
    kernel_table,
    source_heights,
    source_spacing,
)
from .model import EquivalentSourceModel
from .precondition import Schwarz, local_normals

if TYPE_CHECKING:
    from numpy.typing import ArrayLike

#: Largest number of sources for which ``method="auto"`` uses the dense solver (Jacobian of
#: DENSE_LIMIT^2 float64 = 128 MB at 4000).
DENSE_LIMIT = 4000


def _prepare(
    easting: ArrayLike, northing: ArrayLike, upward: ArrayLike, data: ArrayLike, weights: ArrayLike | None
) -> tuple[np.ndarray, ...]:
    """Flat float arrays of the finite data with positive weight, weights normalised to mean 1."""
    e, n, u, d = (
        np.asarray(a, dtype=float).ravel() for a in np.broadcast_arrays(easting, northing, upward, data)
    )
    w = np.ones_like(d) if weights is None else np.asarray(weights, dtype=float).ravel().copy()
    if w.size != d.size:
        raise BadParameter("weights must have the same size as data")
    good = np.isfinite(e) & np.isfinite(n) & np.isfinite(u) & np.isfinite(d) & np.isfinite(w) & (w > 0)
    e, n, u, d, w = e[good], n[good], u[good], d[good], w[good]
    if d.size < 3:
        raise NotEnoughData("need at least 3 finite data to fit equivalent sources")
    return e, n, u, d, w / w.mean()


class DenseProblem:
    """Damped least-squares problem of the dense route: the weighted Jacobian and its normal
    matrix are built once and solved for many dampings (one Cholesky factorisation each)."""

    def __init__(
        self,
        e: np.ndarray,
        n: np.ndarray,
        u: np.ndarray,
        w: np.ndarray,
        depth: float,
        block_size: float | None,
        depth_type: str = "relative",
        ceiling: float | None = None,
    ) -> None:
        if block_size:
            # block-averaged sources (Soler and Uieda 2021), blocks from the data's south-west corner
            (se, sn, su), _ = block_median(e, n, u, np.zeros(e.size), block_size)
        else:
            se, sn, su = e.copy(), n.copy(), u.copy()
        if depth_type == "constant":
            su = np.full(se.size, constant_plane(u, depth, ceiling))
        else:
            su = capped(su - depth, ceiling)
        self.points = (se, sn, su)
        self.scale = float(depth)
        self.jac = dense_jacobian(e, n, u, self.points, self.scale)
        self.sw = np.sqrt(w)
        self.jac *= self.sw[:, None]
        self.normal = normal_matrix(self.jac)

    def solve(self, d: np.ndarray, damping: float) -> np.ndarray:
        """Coefficients of the sources for data ``d`` and ``damping``."""
        return solve_damped_normal(self.normal, self.jac.T @ (self.sw * d), damping)


def dense_jacobian(e: np.ndarray, n: np.ndarray, u: np.ndarray, points: tuple, scale: float) -> np.ndarray:
    """(data, sources) matrix of the dimensionless kernel ``scale / r``."""
    se, sn, su = (np.ascontiguousarray(p, dtype=float) for p in points)
    jac = np.empty((e.size, se.size))
    _dense_jacobian(e, n, u, se, sn, su, float(scale), jac)
    return jac


def _fit_dense(e, n, u, d, w, depth, damping, block_size, depth_type="relative", ceiling=None):
    problem = DenseProblem(e, n, u, w, depth, block_size, depth_type, ceiling)
    return problem.points, problem.solve(d, damping), {}


class LatticeProblem:
    """Damped least-squares problem of the FFT route; built once, solved for many dampings."""

    def __init__(
        self,
        e: np.ndarray,
        n: np.ndarray,
        u: np.ndarray,
        w: np.ndarray,
        depth: float,
        spacing: float,
        depth_type: str = "relative",
        ceiling: float | None = None,
    ) -> None:
        self.e, self.n, self.u = e, n, u
        self.sw = np.sqrt(w)
        self.depth = float(depth)
        margin = INTERP_ORDER // 2 + 1
        lat = Lattice.covering(spacing, e.min(), e.max(), n.min(), n.max(), margin)
        self.lattice = lat
        ix = np.rint((e - lat.x0) / spacing).astype(np.int64)
        iy = np.rint((n - lat.y0) / spacing).astype(np.int64)
        self.data_node = iy * lat.nx + ix  # lattice node nearest to every datum
        self.node_index, groups = np.unique(self.data_node, return_inverse=True)
        src_id = np.full(lat.ny * lat.nx, -1, dtype=np.int64)
        src_id[self.node_index] = np.arange(self.node_index.size)
        self.src_id = src_id.reshape(lat.ny, lat.nx)
        self.src_z, self.scale = source_heights(
            u,
            groups.ravel(),
            np.divmod(self.node_index, lat.nx),
            (lat.ny, lat.nx),
            self.depth,
            depth_type,
            ceiling,
        )
        self.depth_type = depth_type
        # Source planes and data levels of the FFT part: Chebyshev heights; each source is
        # spread over the planes, each datum gathered from the levels, by Lagrange weights.
        self.zp = height_levels(float(self.src_z.min()), float(self.src_z.max()), spacing)
        self.src_v = np.empty((self.n_sources, self.zp.size))
        _plane_weights(self.src_z, self.zp, self.src_v)
        self.zl = height_levels(float(u.min()), float(u.max()), spacing)
        self.conv = Convolver(lat, self.zl, self.zp, self.scale)
        nd = e.size
        points = Points(e, n, u)
        grid = LevelGrid(self.zl, lat.x0, lat.y0, spacing, lat.nx, lat.ny, INTERP_ORDER)
        # Interpolation from the lattice levels to the data: stencil origins and weights only
        # (O(N) memory); applied by numba gather/scatter kernels.
        self.stencils = stencils(points, grid)
        width = (2 * NEAR_CELLS + 1) ** 2
        self.near_cols = np.empty((nd, width), dtype=np.int32)
        # Single precision storage: the same stored values serve the forward and the adjoint,
        # which therefore stay exact transposes (sums are in double precision).
        self.near_vals = np.empty((nd, width), dtype=np.float32)
        table = kernel_table(self.zl, self.zp, spacing, self.scale, TABLE_REACH, True)
        near = NearField(self.src_id, self.src_z, self.src_v, table, TABLE_REACH, self.scale, NEAR_CELLS)
        near_entries(points, grid, near, self.sw, self.near_cols, self.near_vals)
        self.chunks = max(1, numba.get_num_threads())
        self._normals = None  # local normal matrices of the preconditioner, built on first use

    @property
    def n_sources(self) -> int:
        return self.node_index.size

    def forward(self, c: np.ndarray) -> np.ndarray:
        """W^1/2 A c."""
        lat = self.lattice
        grids = np.zeros((self.zp.size, lat.ny * lat.nx))
        grids[:, self.node_index] = (self.src_v * np.asarray(c)[:, None]).T
        levels = self.conv.forward(grids.reshape(-1, lat.ny, lat.nx))
        out = np.empty(self.e.size)
        gather(levels, self.stencils, self.sw, out)
        _near_gather(self.near_cols, self.near_vals, np.ascontiguousarray(c, dtype=float), out)
        return out

    def adjoint(self, r: np.ndarray) -> np.ndarray:
        """A^T W^1/2 r."""
        lat = self.lattice
        r = np.ascontiguousarray(r, dtype=float)
        buffers = np.empty((self.chunks, self.zl.size, lat.ny, lat.nx))
        scatter(r, self.stencils, self.sw, buffers)
        grids = buffers.sum(axis=0)
        del buffers
        planes = self.conv.adjoint(grids).reshape(self.zp.size, -1)[:, self.node_index]
        out = np.einsum("ps,sp->s", planes, self.src_v)
        near = np.empty((self.chunks, self.node_index.size))
        _near_scatter(self.near_cols, self.near_vals, r, near)
        return out + near.sum(axis=0)

    def _preconditioner(self, damping: float) -> Schwarz:
        """Additive Schwarz preconditioner of the damped normal matrix (module
        :mod:`.precondition`). The local normal matrices are computed once and kept, so a
        search over dampings only refactors them."""
        with single_thread_blas():  # ~1,500 small products and factorisations
            if self._normals is None:
                self._normals = local_normals(self)
            return Schwarz(self._normals, damping, self.n_sources, self.chunks)

    def solve(
        self,
        d: np.ndarray,
        damping: float,
        tol: float = 1e-4,
        maxiter: int = 500,
        z0: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray, dict]:
        """Preconditioned CGLS for min |W^1/2 (d - A c)|^2 + damping |c|^2.

        Conjugate gradients on the damped normal equations, run on the stacked operator
        [W^1/2 A; sqrt(damping) I] (CGLS: Hestenes and Stiefel 1952, J. Res. NBS 49:409; Paige
        and Saunders 1982, ACM TOMS 8:43) with the additive Schwarz preconditioner of
        :meth:`_preconditioner` (Bjorck 1996, Numerical Methods for Least Squares Problems,
        SIAM, sec. 7.4). Stops when the preconditioned gradient norm ``sqrt(s^T M^-1 s)`` falls
        below ``tol`` times its value for ``c = 0``.

        Returns
        -------
        coefs, z, info
            ``z`` (= coefs) can warm-start a solve with another damping.
        """
        root = np.sqrt(max(damping, 0.0))
        b = self.sw * d
        blocks = self._preconditioner(damping)

        def forward(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            return self.forward(z), root * z

        def adjoint(r1: np.ndarray, r2: np.ndarray) -> np.ndarray:
            return self.adjoint(r1) + root * r2

        z = np.zeros(self.n_sources) if z0 is None else z0.copy()
        if z0 is None:
            r1, r2 = b.copy(), np.zeros(self.n_sources)
        else:
            q1, q2 = forward(z)
            r1, r2 = b - q1, -q2
        s = adjoint(r1, r2)
        t = blocks.apply(s)
        gamma = float(s @ t)
        if z0 is None:
            gamma0 = gamma
        else:
            s0 = adjoint(b, np.zeros(self.n_sources))
            gamma0 = float(s0 @ blocks.apply(s0))
        p = t.copy()
        it = 0
        if gamma0 <= 0.0:
            return z, z, {"iterations": 0, "converged": True}
        while it < maxiter and gamma > (tol**2) * gamma0:
            q1, q2 = forward(p)
            delta = float(q1 @ q1) + float(q2 @ q2)
            if delta <= 0:
                break
            alpha = gamma / delta
            z += alpha * p
            r1 -= alpha * q1
            r2 -= alpha * q2
            s = adjoint(r1, r2)
            t = blocks.apply(s)
            gamma_new = float(s @ t)
            p = t + (gamma_new / gamma) * p
            gamma = gamma_new
            it += 1
        info = {
            "iterations": it,
            "converged": bool(gamma <= (tol**2) * gamma0),
            "relative_gradient": float(np.sqrt(max(gamma, 0.0) / gamma0)),
        }
        return z.copy(), z, info

    def model(self, coefs: np.ndarray, damping: float, region: tuple | None) -> EquivalentSourceModel:
        lat = self.lattice
        iy, ix = np.divmod(self.node_index, lat.nx)
        points = (lat.x0 + ix * lat.dx, lat.y0 + iy * lat.dx, self.src_z.copy())
        return EquivalentSourceModel(
            method="fft",
            points=points,
            coefs=coefs,
            scale=self.scale,
            depth=self.depth,
            damping=float(damping),
            block_size=lat.dx,
            region=region,
            lattice=(lat.x0, lat.y0, lat.dx, lat.nx, lat.ny),
            node_index=self.node_index,
            info={"levels": int(self.zl.size), "planes": int(self.zp.size), "depth_type": self.depth_type},
        )


def _source_count(n_data, region, block_size):
    """Upper estimate of the number of sources: one per datum, or at most one per block.

    Parameters
    ----------
    n_data : int
        Number of data.
    region : tuple of float
        ``(west, east, south, north)`` of the data (m).
    block_size : float or None
        Block size (m) of block-averaged sources; None (or 0) for one source per datum.

    Returns
    -------
    int
    """
    if not block_size:
        return n_data
    span = max(region[1] - region[0], block_size) * max(region[3] - region[2], block_size)
    return min(n_data, int(span / block_size**2) + 1)


def solver_method(method: str, n_data: int, region: tuple, block_size: float | None) -> str:
    """The solver :func:`fit_equivalent_sources` uses for ``n_data`` data in ``region``:
    ``method`` itself, or for ``"auto"`` dense up to :data:`DENSE_LIMIT` sources (estimated by
    :func:`_source_count`) and the FFT lattice beyond."""
    if method not in ("auto", "dense", "fft"):
        raise BadParameter(f"unknown method '{method}'; use 'auto', 'dense' or 'fft'")
    if method != "auto":
        return method
    return "dense" if _source_count(n_data, region, block_size) <= DENSE_LIMIT else "fft"


def _check_depth_type(depth_type):
    if depth_type not in ("relative", "constant"):
        raise BadParameter(f"unknown depth_type '{depth_type}'; use 'relative' or 'constant'")


def _default_depth(e, n):
    # harmonica's default: 4.5 x mean nearest-neighbour distance (Soler and Uieda 2021).
    return 4.5 * float(np.mean(nearest_neighbour_distances(e, n)))


def fit_equivalent_sources(
    easting: np.ndarray,
    northing: np.ndarray,
    upward: np.ndarray,
    data: np.ndarray,
    weights: np.ndarray | None = None,
    depth: float | str = "default",
    damping: float = 1e-3,
    block_size: float | None = None,
    method: str = "auto",
    tol: float = 2e-5,
    maxiter: int = 1000,
    depth_type: str = "relative",
    ceiling: float | None = None,
) -> EquivalentSourceModel:
    """Fit equivalent point sources to scalar potential-field data.

    Parameters
    ----------
    easting, northing, upward : arrays
        Data positions (m); ``upward`` is the height of each reading.
    data : array
        Field values (nT, mGal, ...). NaN values are ignored.
    weights : array, optional
        Data weights (e.g. 1 / sigma^2); normalised to mean 1.
    depth : float or "default"
        Source depth (m), see ``depth_type``. ``"default"``: 4.5 x the mean nearest-neighbour
        distance (Soler and Uieda 2021).
    damping : float
        Damping of the dimensionless objective (module docstring); 0 = none.
    block_size : float, optional
        Block size (m). For ``"fft"`` the finest source lattice spacing: the lattice spacing
        is :func:`source_spacing` (``max(block_size, depth / 4)``; default block size: the
        median nearest-neighbour distance); for ``"dense"`` it places one source per block at the block
        median position (Soler and Uieda 2021), None = one source per datum (Cordell 1992).
    method : {"auto", "dense", "fft"}
        ``"auto"``: dense up to :data:`DENSE_LIMIT` sources, else FFT.
    tol, maxiter : float, int
        CGLS stopping rule of the FFT route (relative norm of the normal-equation residual).
    depth_type : {"relative", "constant"}
        ``"relative"``: every source ``depth`` below its own data (below each datum or block for
        ``"dense"``; below the median height of the data at its lattice node for ``"fft"``,
        and there at least ``depth / 2`` below the data nearby), so the layer follows a draped
        survey (Cordell 1992; Soler and Uieda 2021). ``"constant"``: one plane ``depth`` below
        the median data height, at least ``depth / 2`` below every datum.
    ceiling : float, optional
        Highest allowed source height (m), e.g. to keep the layer below a grid surface.

    Returns
    -------
    EquivalentSourceModel

    References
    ----------
    Dampney (1969) Geophysics 34:39; Cordell (1992) Geophysics 57:629; Soler and Uieda (2021)
    Geophys. J. Int. 227:1768; Takahashi, Oliveira and Barbosa (2020) Geophysics 85(6):G129.
    """
    e, n, u, d, w = _prepare(easting, northing, upward, data, weights)
    region = (float(e.min()), float(e.max()), float(n.min()), float(n.max()))
    if isinstance(depth, str):
        if depth != "default":
            raise BadParameter(f"depth must be a number or 'default', not '{depth}'")
        depth = _default_depth(e, n)
    depth = float(depth)
    if not depth > 0:
        raise BadParameter("depth must be positive")
    damping = float(damping or 0.0)
    _check_depth_type(depth_type)
    chosen = solver_method(method, d.size, region, block_size)
    if chosen == "dense":
        points, coefs, info = _fit_dense(e, n, u, d, w, depth, damping, block_size, depth_type, ceiling)
        return EquivalentSourceModel(
            "dense", points, coefs, depth, depth, damping, float(block_size or 0.0), region, info=info
        )
    spacing = source_spacing(depth, block_size if block_size else median_spacing(e, n))
    problem = LatticeProblem(e, n, u, w, depth, spacing, depth_type, ceiling)
    coefs, _, info = problem.solve(d, damping, tol=tol, maxiter=maxiter)
    model = problem.model(coefs, damping, region)
    model.info.update(info)
    return model
