"""NetCDF outputs against the CF Conventions 1.8 document (Eaton et al. 2020, cfconventions.org),
read back with xarray (an independent reader) and checked rule by rule."""

from __future__ import annotations

import numpy as np
import pyproj
import xarray as xr

from potfield.io.grids import make_grid, read_netcdf, to_dataset, write_netcdf, write_products

GLOBAL = ("Conventions", "title", "summary", "source", "history")


def _grid(name="anomaly", scale=1.0):
    east = np.arange(500_000.0, 501_000.0, 100.0)
    north = np.arange(6_400_000.0, 6_400_800.0, 100.0)
    values = scale * np.add.outer(north - north.min(), east - east.min())
    grid = make_grid(
        east, north, values, name=name, units="nT", long_name=f"test {name}", history="made by a test"
    )
    grid.attrs["height"] = 300.0
    grid.attrs["positive"] = "up"  # must not survive on a data variable
    return grid


def _cf_rules(ds: xr.Dataset) -> list[str]:
    problems = []
    for key in GLOBAL:  # CF 1.8 sec. 2.6.1-2.6.2 (summary: ACDD 1.3)
        if not str(ds.attrs.get(key, "")).strip():
            problems.append(f"global attribute {key} missing")
    if ds.attrs.get("Conventions") != "CF-1.8":
        problems.append("Conventions is not CF-1.8")
    for name, var in ds.data_vars.items():
        if name == "crs":
            if "grid_mapping_name" not in var.attrs:  # sec. 5.6
                problems.append("crs has no grid_mapping_name")
            continue
        if "units" not in var.attrs:  # sec. 3.1
            problems.append(f"{name} has no units")
        if "positive" in var.attrs:  # sec. 4.3: positive belongs to vertical coordinates only
            problems.append(f"{name} carries positive")
        if var.attrs.get("grid_mapping") != "crs":  # sec. 5.6
            problems.append(f"{name} does not name its grid mapping")
    for name in ("easting", "northing"):  # sec. 4 / 5.6: projection coordinates
        if ds[name].attrs.get("units") != "m":
            problems.append(f"{name} has no units m")
    if "height" in ds.coords:  # sec. 4.3 vertical coordinate, sec. 5.7 scalar coordinate
        h = ds["height"]
        if (
            h.ndim != 0
            or h.attrs.get("positive") != "up"
            or h.attrs.get("units") != "m"
            or h.attrs.get("standard_name") != "height"
        ):
            problems.append("height is not a CF scalar vertical coordinate")
    if any(ch.isdigit() for ch in ds.attrs.get("history", "")[:4]):
        problems.append("history starts with a time stamp")
    return problems


def test_single_grid_file_follows_the_cf_rules(tmp_path):
    path = write_netcdf(tmp_path / "anomaly.nc", _grid(), "EPSG:32755")
    with xr.open_dataset(path) as ds:
        assert _cf_rules(ds) == []
        assert float(ds["height"]) == 300.0
        assert pyproj.CRS.from_cf(ds["crs"].attrs).to_epsg() == 32755
    back = read_netcdf(path)  # in memory the height is an attribute again (derive reads it)
    assert back.attrs["height"] == 300.0


def test_the_rule_checker_fails_on_a_bad_file():
    # the checker above must be able to fail: a data variable with positive, no summary
    ds = to_dataset(_grid(), "EPSG:32755")
    ds["anomaly"].attrs["positive"] = "up"
    del ds.attrs["summary"]
    assert len(_cf_rules(ds)) == 2


def test_same_grid_same_bytes(tmp_path):
    # no wall-clock stamp: writing twice gives identical files (determinism)
    a = write_netcdf(tmp_path / "a.nc", _grid(), "EPSG:32755").read_bytes()
    b = write_netcdf(tmp_path / "b.nc", _grid(), "EPSG:32755").read_bytes()
    assert a == b


def test_products_file_holds_every_grid_on_shared_coordinates(tmp_path):
    paths = {}
    for name, scale in (("anomaly", 1.0), ("anomaly_vertical_derivative", 0.01)):
        paths[name] = write_netcdf(tmp_path / f"{name}.nc", _grid(name, scale), "EPSG:32755")
    other = make_grid(
        np.arange(3.0),
        np.arange(2.0),
        np.zeros((2, 3)),
        name="elsewhere",
        units="m",
        long_name="other coordinates",
    )
    paths["elsewhere"] = write_netcdf(tmp_path / "elsewhere.nc", other, "EPSG:32755")
    out = write_products(tmp_path / "products.nc", paths, "EPSG:32755", title="test products")
    with xr.open_dataset(out) as ds:
        assert _cf_rules(ds) == []
        assert set(ds.data_vars) == {"anomaly", "anomaly_vertical_derivative", "crs"}
        assert "elsewhere" in ds.attrs["comment"]
        np.testing.assert_array_equal(ds["anomaly"].values, read_netcdf(paths["anomaly"]).values)
