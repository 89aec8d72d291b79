"""Grids: xarray DataArrays with ``northing``/``easting`` dimensions, written as NetCDF-CF.

Conventions: dimensions are ``("northing", "easting")`` with both coordinates ascending (an FFT on
a grid with descending northing flips the result north-south; Blakely 1995), values carry
``units`` and ``long_name`` attributes, and the CRS travels as a CF grid-mapping variable built by
:meth:`pyproj.CRS.to_cf`.

CF rules kept here (CF Conventions 1.8, Eaton et al. 2020, cfconventions.org): global ``Conventions
= "CF-1.8"`` (sec. 2.6.1) with the discovery attributes ``title``, ``summary``, ``source``,
``history`` (sec. 2.6.2; ``summary`` from the ACDD 1.3 conventions); ``units`` on every data and
coordinate variable (sec. 3.1); the ``positive`` attribute only on a vertical coordinate (sec. 4.3),
so the grid height is a scalar coordinate ``height`` (sec. 5.7) with ``standard_name = "height"``,
``positive = "up"``; the grid mapping (sec. 5.6) named by ``grid_mapping``. ``history`` carries no
wall-clock time, so the same inputs give the same bytes; the run time is in manifest.json only.
"""

from __future__ import annotations

from collections import OrderedDict
from pathlib import Path

import numpy as np
import pyproj
import xarray as xr

from .atomic import atomic_path


def make_grid(
    easting, northing, values, *, name: str, units: str, long_name: str, history: str = ""
) -> xr.DataArray:
    """A grid DataArray from 1-D ascending coordinates and a (northing, easting) array."""
    easting = np.asarray(easting, dtype=float)
    northing = np.asarray(northing, dtype=float)
    values = np.asarray(values, dtype=float)
    grid = xr.DataArray(
        values,
        coords={"northing": northing, "easting": easting},
        dims=("northing", "easting"),
        name=name,
        attrs={"units": units, "long_name": long_name, "history": history},
    )
    return ascending(grid)


def ascending(grid: xr.DataArray) -> xr.DataArray:
    """Sort both coordinates ascending (no-op when already so)."""
    for dim in ("northing", "easting"):
        if dim in grid.dims and grid[dim].size > 1 and grid[dim].values[1] < grid[dim].values[0]:
            grid = grid.isel({dim: slice(None, None, -1)})
    return grid


#: Attributes that belong to a vertical coordinate only (CF 1.8 sec. 4.3), never to data variables.
_COORDINATE_ONLY = ("positive", "axis")
#: The height coordinate (CF 1.8 sec. 4.3 and 5.7; standard name table "height").
HEIGHT_ATTRS = {
    "standard_name": "height",
    "long_name": "grid height above the WGS84 ellipsoid",
    "units": "m",
    "positive": "up",
    "axis": "Z",
}
SOURCE = "potfield (potential-field survey processing)"


def _cf_variable(grid: xr.DataArray) -> xr.DataArray:
    """The grid with a CF height coordinate and clean data-variable attributes."""
    grid = grid.copy(deep=False)
    attrs = dict(grid.attrs)
    height = attrs.pop("height", None)
    for key in _COORDINATE_ONLY:
        attrs.pop(key, None)
    attrs.setdefault("units", "1")
    if (
        "height" not in grid.coords
        and isinstance(height, (int, float, np.floating))
        and np.isfinite(float(height))
    ):
        grid = grid.assign_coords(height=float(height))
    if "height" in grid.coords:
        grid["height"].attrs.update(HEIGHT_ATTRS)
    if "upward" in grid.coords:  # a draped grid: the height of every cell (auxiliary coordinate)
        grid["upward"].attrs.update(
            {**HEIGHT_ATTRS, "long_name": "height of each grid cell above the WGS84 ellipsoid (draped grid)"}
        )
        grid["upward"].attrs.pop("axis", None)
    grid.attrs = attrs
    return grid


def _coordinates(ds: xr.Dataset) -> None:
    ds["easting"].attrs.update(
        {"standard_name": "projection_x_coordinate", "units": "m", "long_name": "easting", "axis": "X"}
    )
    ds["northing"].attrs.update(
        {"standard_name": "projection_y_coordinate", "units": "m", "long_name": "northing", "axis": "Y"}
    )


def to_dataset(
    grid: xr.DataArray, crs: pyproj.CRS | str, *, title: str | None = None, summary: str | None = None
) -> xr.Dataset:
    """Dataset with CF-1.8 attributes and a ``crs`` grid-mapping variable (see the module notes)."""
    crs = pyproj.CRS.from_user_input(crs)
    grid = _cf_variable(ascending(grid))
    name = grid.name or "field"
    history = grid.attrs.pop("history", "")
    ds = grid.to_dataset(name=name)
    ds["crs"] = xr.DataArray(np.int32(0), attrs=crs.to_cf())
    ds[name].attrs["grid_mapping"] = "crs"
    _coordinates(ds)
    long_name = grid.attrs.get("long_name", name)
    ds.attrs.update(
        {
            "Conventions": "CF-1.8",
            "title": title or long_name,
            "summary": summary
            or (
                f"{long_name} ({grid.attrs.get('units', '')}) on a regular "
                f"{ds.sizes['easting']} x {ds.sizes['northing']} grid in "
                f"{crs.name}"
            ),
            "source": SOURCE,
            "history": f"potfield: {history}".strip() if history else "potfield",
        }
    )
    return ds


def products_dataset(grids: dict[str, xr.DataArray], crs, *, title: str) -> xr.Dataset:
    """One CF-1.8 dataset holding every grid product that shares the main grid's coordinates.

    Grids on other coordinates are left out (listed in the ``comment`` attribute); each variable
    keeps its units, long_name and history (as the non-standard attribute ``processing``).
    """
    crs = pyproj.CRS.from_user_input(crs)
    variables, skipped, ref = {}, [], None
    for name in sorted(grids):
        grid = _cf_variable(ascending(grids[name]).rename(name))
        grid = grid.drop_vars([c for c in grid.coords if c not in ("easting", "northing")])
        history = grid.attrs.pop("history", "")
        if history:
            grid.attrs["processing"] = history
        grid.attrs["grid_mapping"] = "crs"
        if ref is None:
            ref = grid
        elif not (
            grid.sizes == ref.sizes
            and np.array_equal(grid.easting, ref.easting)
            and np.array_equal(grid.northing, ref.northing)
        ):
            skipped.append(name)
            continue
        variables[name] = grid
    ds = xr.Dataset(variables)
    ds["crs"] = xr.DataArray(np.int32(0), attrs=crs.to_cf())
    if variables:
        _coordinates(ds)
    ds.attrs.update(
        {
            "Conventions": "CF-1.8",
            "title": title,
            "summary": (
                f"{len(variables)} gridded products of one survey in {crs.name}: " + ", ".join(variables)
            ),
            "source": SOURCE,
            "history": "potfield: every grid of out/grids gathered into one file",
        }
    )
    if skipped:
        ds.attrs["comment"] = "on other coordinates, kept in their own files: " + ", ".join(skipped)
    return ds


def write_products(path: Path | str, grid_paths: dict[str, Path], crs, *, title: str) -> Path | None:
    """Write ``products.nc``: every grid of ``grid_paths`` in one CF-1.8 file (atomic)."""
    grids = {
        name: read_netcdf(p)
        for name, p in sorted(grid_paths.items())
        if Path(p).is_file() and Path(p).resolve() != Path(path).resolve()
    }
    if not grids:
        return None
    ds = products_dataset(grids, crs, title=title)
    encoding = {v: {"zlib": True, "complevel": 4, "_FillValue": np.nan} for v in ds.data_vars if v != "crs"}
    with atomic_path(path) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)
    return Path(path)


def write_netcdf(path: Path | str, grid: xr.DataArray, crs) -> Path:
    """Write one grid as NetCDF-CF (atomic)."""
    ds = to_dataset(grid, crs)
    encoding = {grid.name or "field": {"zlib": True, "complevel": 4, "_FillValue": np.nan}}
    with atomic_path(path) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)
    return Path(path)


#: Grids already read in this process: file -> ((mtime_ns, size), grid). A run reads each grid
#: several times (later stages, the report's maps and tables, products.nc) and each read of a
#: small NetCDF file costs ~45 ms of HDF5 bookkeeping. Least recently used first out, beyond
#: :data:`READ_MEMO_BYTES` of grid values.
_READ_MEMO: OrderedDict[Path, tuple[tuple[int, int], xr.DataArray]] = OrderedDict()
READ_MEMO_BYTES = 256 * 2**20


def read_netcdf(path: Path | str) -> xr.DataArray:
    """Read a grid written by :func:`write_netcdf` (loaded into memory, file closed).

    A file read before and unchanged since (same modification time and size) is not read again:
    the caller gets a new DataArray on the same values, which are read-only (a grid is never
    changed in place; an attempt fails loudly instead of changing another caller's grid).
    """
    path = Path(path).resolve()
    info = path.stat()
    stamp = (info.st_mtime_ns, info.st_size)
    memo = _READ_MEMO.get(path)
    if memo is not None and memo[0] == stamp:
        _READ_MEMO.move_to_end(path)
        return memo[1].copy(deep=False)
    grid = _read_netcdf_file(path)
    grid.values.setflags(write=False)
    _READ_MEMO[path] = (stamp, grid)
    while sum(g.nbytes for _, g in _READ_MEMO.values()) > READ_MEMO_BYTES and len(_READ_MEMO) > 1:
        _READ_MEMO.popitem(last=False)
    return grid.copy(deep=False)


def _read_netcdf_file(path: Path) -> xr.DataArray:
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        names = [v for v in ds.data_vars if v != "crs"]
        grid = ds[names[0]].load()
        history = ds.attrs.get("history", "")
    grid.attrs.pop("grid_mapping", None)
    if history.startswith("potfield: ") and "history" not in grid.attrs:
        grid.attrs["history"] = history[len("potfield: ") :]
    if "height" in grid.coords and grid["height"].ndim == 0:  # back to the in-memory convention
        grid.attrs["height"] = float(grid["height"])
        grid = grid.drop_vars("height")
    for coord in ("upward",):
        if coord in grid.coords:
            grid[coord].attrs = {}
    return grid


def write_geotiff(path: Path | str, grid: xr.DataArray, crs) -> Path:
    """Write one grid as GeoTIFF (north-up, as GIS software expects)."""
    import rioxarray  # noqa: F401  (registers the .rio accessor)

    crs = pyproj.CRS.from_user_input(crs)
    da = ascending(grid).isel(northing=slice(None, None, -1))
    da = da.rename({"easting": "x", "northing": "y"})
    da = da.rio.write_crs(crs.to_wkt()).rio.set_spatial_dims(x_dim="x", y_dim="y")
    with atomic_path(path) as tmp:
        da.rio.to_raster(tmp, driver="GTiff")
    return Path(path)
