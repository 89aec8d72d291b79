"""Grids: xarray DataArrays with ``northing``/``easting`` dimensions, written as NetCDF-CF.

Conventions: dimensions are ``("northing", "easting")`` with both coordinates ascending (an FFT on
a grid with descending northing flips the result north-south; Blakely 1995), values carry
``units`` and ``long_name`` attributes, and the CRS travels as a CF grid-mapping variable built by
:meth:`pyproj.CRS.to_cf`.
"""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pyproj
import xarray as xr

from .atomic import atomic_path


def make_grid(easting, northing, values, *, name: str, units: str, long_name: str,
              history: str = "") -> xr.DataArray:
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


def to_dataset(grid: xr.DataArray, crs: pyproj.CRS | str) -> xr.Dataset:
    """Dataset with CF attributes and a ``crs`` grid-mapping variable."""
    crs = pyproj.CRS.from_user_input(crs)
    grid = ascending(grid)
    name = grid.name or "field"
    ds = grid.to_dataset(name=name)
    ds["crs"] = xr.DataArray(np.int32(0), attrs=crs.to_cf())
    ds[name].attrs["grid_mapping"] = "crs"
    ds["easting"].attrs.update({"standard_name": "projection_x_coordinate", "units": "m",
                                "long_name": "easting", "axis": "X"})
    ds["northing"].attrs.update({"standard_name": "projection_y_coordinate", "units": "m",
                                 "long_name": "northing", "axis": "Y"})
    stamp = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    history = grid.attrs.get("history", "")
    ds.attrs.update({
        "Conventions": "CF-1.8",
        "title": grid.attrs.get("long_name", name),
        "source": "potfield",
        "history": f"{stamp} potfield: {history}".strip(),
    })
    return ds


def write_netcdf(path: Path | str, grid: xr.DataArray, crs) -> Path:
    """Write one grid as NetCDF-CF (atomic)."""
    ds = to_dataset(grid, crs)
    encoding = {grid.name or "field": {"zlib": True, "complevel": 4, "_FillValue": np.nan}}
    with atomic_path(path) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf", encoding=encoding)
    return Path(path)


def read_netcdf(path: Path | str) -> xr.DataArray:
    """Read a grid written by :func:`write_netcdf` (loaded into memory, file closed)."""
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        names = [v for v in ds.data_vars if v != "crs"]
        grid = ds[names[0]].load()
    grid.attrs.pop("grid_mapping", None)
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
