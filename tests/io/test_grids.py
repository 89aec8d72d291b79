"""Grid writers: NetCDF-CF with the CRS and GeoTIFF, both read back by independent readers
(xarray/h5netcdf, rioxarray/GDAL)."""

from __future__ import annotations

import numpy as np
import pyproj
import pytest
import rioxarray
import xarray as xr

from potfield.io.grids import make_grid, read_netcdf, write_geotiff, write_netcdf


def _grid():
    east = np.arange(500_000.0, 500_000.0 + 10 * 100, 100)
    north = np.arange(6_400_000.0, 6_400_000.0 + 8 * 100, 100)[::-1]  # descending on purpose
    values = np.add.outer(north - north.min(), (east - east.min()) * 0.01)
    return make_grid(east, north, values, name="anomaly", units="nT", long_name="test field")


def test_make_grid_sorts_ascending():
    grid = _grid()
    assert np.all(np.diff(grid.northing.values) > 0)
    # the value at the highest northing row is the largest (no north-south flip)
    assert grid.values[-1, 0] > grid.values[0, 0]


def test_netcdf_cf_roundtrip(tmp_path):
    grid = _grid()
    path = write_netcdf(tmp_path / "a.nc", grid, "EPSG:32755")
    with xr.open_dataset(path) as ds:
        assert ds.attrs["Conventions"] == "CF-1.8"
        crs = pyproj.CRS.from_cf(ds["crs"].attrs)  # CF grid mapping readable by pyproj
        assert crs.to_epsg() == 32755
        assert ds["easting"].attrs["standard_name"] == "projection_x_coordinate"
    back = read_netcdf(path)
    np.testing.assert_array_equal(back.values, grid.values)


def test_geotiff_is_north_up_with_crs(tmp_path):
    grid = _grid()
    path = write_geotiff(tmp_path / "a.tif", grid, "EPSG:32755")
    raster = rioxarray.open_rasterio(path).squeeze()
    assert raster.rio.crs.to_epsg() == 32755
    assert raster.y.values[0] > raster.y.values[-1]  # first row is the northernmost (GIS order)
    np.testing.assert_allclose(raster.values[0], grid.values[-1])
    np.testing.assert_allclose(raster.x.values, grid.easting.values)


def test_a_grid_read_twice_comes_from_memory_until_its_file_changes(tmp_path):
    """Reads of an unchanged file share read-only values; a rewritten file is read again
    (common practice for a file cache: keyed by modification time and size)."""
    grid = _grid()
    path = write_netcdf(tmp_path / "a.nc", grid, "EPSG:32755")
    first, second = read_netcdf(path), read_netcdf(path)
    assert first is not second and np.shares_memory(first.values, second.values)
    with pytest.raises(ValueError):
        first.values[0, 0] = 0.0  # a grid is never changed in place
    second.attrs["units"] = "changed"  # a caller's attributes are its own
    assert read_netcdf(path).attrs["units"] == "nT"
    write_netcdf(path, (grid * 2).rename("anomaly").assign_attrs(grid.attrs), "EPSG:32755")
    np.testing.assert_array_equal(read_netcdf(path).values, 2 * grid.values)
