"""The fitted equivalent-source model: prediction at points and on grids, and save/load."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from ....io.atomic import atomic_path
from ...errors import BadGeometry
from .kernels import (
    LevelGrid,
    NearField,
    Points,
    _direct_sum,
    _plane_weights,
    predict_lattice,
)
from .lattice import (
    INTERP_ORDER,
    NEAR_CELLS,
    NEAR_FREE_HEIGHT,
    TABLE_REACH,
    Convolver,
    Lattice,
    height_levels,
    kernel_table,
)

#: Number of readings x sources below which predictions use the exact direct sum.
DIRECT_LIMIT = 2.0e8


@dataclass
class EquivalentSourceModel:
    """Fitted point sources: positions, coefficients and how they were made.

    Attributes
    ----------
    method : str
        ``"dense"`` (sources at relative depth beneath data) or ``"fft"`` (sources on a lattice
        plane, see the module docstring).
    points : tuple of 3 arrays
        Source positions (easting, northing, upward), m.
    coefs : array
        Source coefficients (data unit; kernel ``scale / r``).
    scale : float
        Kernel scale (the source depth, m), which makes the coefficients carry the data unit.
    depth, damping, block_size : float
        Fit parameters (``block_size``: source lattice spacing / block size, m; 0 = none).
    region : tuple
        (west, east, south, north) of the fitted data.
    lattice : tuple or None
        ``(x0, y0, dx, nx, ny)`` of the source lattice (``"fft"`` only).
    node_index : array or None
        Flat lattice index (row-major, northing then easting) of each source (``"fft"``).
    """

    method: str
    points: tuple
    coefs: np.ndarray
    scale: float
    depth: float
    damping: float
    block_size: float
    region: tuple
    lattice: tuple | None = None
    node_index: np.ndarray | None = None
    info: dict = field(default_factory=dict)

    @property
    def n_sources(self) -> int:
        return int(self.coefs.size)

    def predict(self, coordinates: tuple) -> np.ndarray:
        """Field of the sources at points ``(easting, northing, upward)`` (any equal shapes).

        Uses the exact direct sum when it is small enough, else (``"fft"`` models) the
        pre-corrected FFT evaluation on a lattice covering the points.
        """
        e, n, u = (np.asarray(c, dtype=float) for c in np.broadcast_arrays(*coordinates[:3]))
        shape = e.shape
        e, n, u = e.ravel(), n.ravel(), u.ravel()
        out = np.empty(e.size)
        if e.size == 0:
            return out.reshape(shape)
        if self.method == "fft" and e.size * self.n_sources > DIRECT_LIMIT:
            out = self._predict_fft(e, n, u)
        else:
            se, sn, su = (np.ascontiguousarray(p, dtype=float) for p in self.points)
            _direct_sum(e, n, u, se, sn, su, self.coefs, float(self.scale), out)
        return out.reshape(shape)

    def _predict_fft(self, e: np.ndarray, n: np.ndarray, u: np.ndarray) -> np.ndarray:
        x0, y0, dx, nx, _ = self.lattice
        src_iy, src_ix = np.divmod(self.node_index, int(nx))
        margin = INTERP_ORDER // 2 + 1
        west = min(e.min(), x0 + src_ix.min() * dx)
        east = max(e.max(), x0 + src_ix.max() * dx)
        south = min(n.min(), y0 + src_iy.min() * dx)
        north = max(n.max(), y0 + src_iy.max() * dx)
        # Align the evaluation lattice with the source lattice (whole-cell offsets).
        ox = int(np.floor((west - x0) / dx)) - margin
        oy = int(np.floor((south - y0) / dx)) - margin
        lat = Lattice(
            x0 + ox * dx,
            y0 + oy * dx,
            dx,
            int(np.ceil((east - x0) / dx)) - ox + margin + 1,
            int(np.ceil((north - y0) / dx)) - oy + margin + 1,
        )
        src_z = np.ascontiguousarray(self.points[2], dtype=float)
        if u.min() <= src_z.min():
            raise BadGeometry(
                f"prediction points must lie above the equivalent sources (upward > {src_z.min():.1f} m)"
            )
        zl = height_levels(float(u.min()), float(u.max()), dx)
        zp = height_levels(float(src_z.min()), float(src_z.max()), dx)
        src_v = np.empty((self.n_sources, zp.size))
        _plane_weights(src_z, zp, src_v)
        # High above every source the lattice interpolation alone is exact enough (true
        # kernel, no near field); otherwise the cored kernel and the exact near field.
        near = bool(u.min() - src_z.max() < NEAR_FREE_HEIGHT * dx)
        grids = np.zeros((zp.size, lat.ny, lat.nx))
        iy, ix = src_iy - oy, src_ix - ox
        grids[:, iy, ix] = (src_v * self.coefs[:, None]).T
        src_id = np.full((lat.ny, lat.nx), -1, dtype=np.int64)
        src_id[iy, ix] = np.arange(self.n_sources)
        conv = Convolver(lat, zl, zp, float(self.scale), core=near)
        levels = np.ascontiguousarray(conv.forward(grids))
        del conv, grids
        table = kernel_table(zl, zp, dx, float(self.scale), TABLE_REACH, near)
        out = np.empty(e.size)
        grid = LevelGrid(zl, lat.x0, lat.y0, dx, lat.nx, lat.ny, INTERP_ORDER)
        sources = NearField(src_id, src_z, src_v, table, TABLE_REACH, float(self.scale), NEAR_CELLS)
        predict_lattice(
            Points(e, n, u), levels, grid, sources, np.ascontiguousarray(self.coefs, dtype=float), near, out
        )
        return out

    def grid(
        self,
        region: tuple | None = None,
        spacing: float | None = None,
        height: float | np.ndarray | None = None,
        *,
        name: str = "field",
        shape: tuple | None = None,
    ) -> xr.DataArray:
        """Predict on a regular grid at constant ``height`` (m) or on a drape surface.

        Parameters
        ----------
        region : (west, east, south, north), optional
            Default: the fitted data region.
        spacing : float
            Cell size (m).
        height : float or 2-D array of shape (northing, easting)
            Constant height, or a surface of heights (drape).
        name : str
            Name of the returned DataArray.

        Returns
        -------
        xarray.DataArray
            Dimensions ``("northing", "easting")``, both ascending.
        """
        region = tuple(self.region if region is None else region)
        import verde as vd

        easting, northing = vd.grid_coordinates(region, spacing=spacing, shape=shape, adjust="region")
        if height is None:
            raise BadGeometry("grid needs a height (constant or a drape surface)")
        upward = np.broadcast_to(np.asarray(height, dtype=float), easting.shape)
        values = self.predict((easting, northing, upward))
        return xr.DataArray(
            values,
            dims=("northing", "easting"),
            coords={"northing": northing[:, 0], "easting": easting[0]},
            name=name,
        )


def save_model(path: str | Path, model: EquivalentSourceModel) -> Path:
    """Save a fitted model to ``path`` (.npz, written atomically)."""
    arrays = {
        "method": np.array(model.method),
        "points": np.vstack([np.asarray(p, dtype=float) for p in model.points]),
        "coefs": np.asarray(model.coefs, dtype=float),
        "scalars": np.array([model.scale, model.depth, model.damping, model.block_size]),
        "region": np.asarray(model.region, dtype=float),
    }
    if model.method == "fft":
        arrays["lattice"] = np.asarray(model.lattice, dtype=float)
        arrays["node_index"] = np.asarray(model.node_index, dtype=np.int64)
    with atomic_path(path) as tmp, open(tmp, "wb") as handle:
        np.savez_compressed(handle, **arrays)
    return Path(path)


def load_model(path: str | Path) -> EquivalentSourceModel:
    """Load a model written by :func:`save_model`."""
    with np.load(path, allow_pickle=False) as npz:
        method = str(npz["method"])
        points = tuple(np.array(p) for p in npz["points"])
        scale, depth, damping, block = (float(v) for v in npz["scalars"])
        region = tuple(float(v) for v in npz["region"])
        lattice = node_index = None
        if method == "fft":
            lat = npz["lattice"]
            lattice = (float(lat[0]), float(lat[1]), float(lat[2]), int(lat[3]), int(lat[4]))
            node_index = np.array(npz["node_index"])
        coefs = np.array(npz["coefs"])
    return EquivalentSourceModel(
        method, points, coefs, scale, depth, damping, block, region, lattice, node_index
    )
