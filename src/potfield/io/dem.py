"""Digital elevation models: read NetCDF (any CF grid), GeoTIFF or an x,y,z text table, and
return an elevation grid in the survey CRS with ascending ``northing``/``easting`` (the
potfield.io.grids conventions).

CRS rules: the DEM CRS is ``dem_crs`` when given (it overrides the file), else the CRS stored in
the file (CF grid mapping, ``crs_wkt``/``spatial_ref`` attributes, GeoTIFF georeferencing, or
longitude/latitude coordinates in degrees). A DEM without any CRS is taken to be in the survey
CRS, except when its coordinates look geographic while the survey CRS is projected (or the
reverse): that is an error asking for ``reference.dem_crs``. A DEM in another CRS is resampled
onto a regular grid in the survey CRS: the target nodes are transformed back with pyproj and the
elevations interpolated bilinearly (cells outside the DEM become NaN).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import xarray as xr

from ..errors import CRSError, InputDataError
from .grids import make_grid

#: Suffixes read as each format.
NETCDF_SUFFIXES = (".nc", ".nc4", ".cdf", ".netcdf")
GEOTIFF_SUFFIXES = (".tif", ".tiff", ".gtiff")
TEXT_SUFFIXES = (".xyz", ".txt", ".csv", ".dat", ".asc")

_X_NAMES = ("easting", "x", "east", "lon", "longitude", "long", "lng")
_Y_NAMES = ("northing", "y", "north", "lat", "latitude")


def read_dem(
    path,
    survey_crs,
    dem_crs: str | None = None,
    *,
    key: str = "reference.dem_file",
    max_cells: int = 400_000_000,
) -> xr.DataArray:
    """Read a DEM and return it in the survey CRS.

    Parameters
    ----------
    path : str or Path
        NetCDF, GeoTIFF or x,y,z text file (regular grid).
    survey_crs : str or pyproj.CRS
        CRS of the survey's easting/northing (projected, metres).
    dem_crs : str, optional
        CRS of the DEM coordinates; overrides any CRS found in the file.
    key : str
        survey.toml key named in error messages.
    max_cells : int
        Refuse to build a reprojected grid larger than this.

    Returns
    -------
    xarray.DataArray
        ``elevation`` (m) with dims ("northing", "easting") ascending; attrs hold ``crs``
        (WKT of the survey CRS), ``source_crs`` and ``source``.

    Raises
    ------
    potfield.errors.InputDataError
        Missing, empty or unreadable file, no 2-D variable, not a regular grid.
    potfield.errors.CRSError
        Unknown CRS, or a DEM in another CRS without one declared.
    """
    path = Path(path)
    if not path.is_file():
        raise InputDataError(
            "DEM file not found",
            file=path,
            key=key,
            fix="check reference.dem_file (relative to the survey folder)",
        )
    if path.stat().st_size == 0:
        raise InputDataError(
            "DEM file is empty", file=path, key=key, fix="point reference.dem_file at a valid DEM"
        )
    target = _parse_crs(survey_crs, path, "survey.output_crs")
    suffix = path.suffix.lower()
    if suffix in GEOTIFF_SUFFIXES:
        x, y, z, file_crs = _read_geotiff(path, key)
    elif suffix in NETCDF_SUFFIXES:
        x, y, z, file_crs = _read_netcdf(path, key)
    elif suffix in TEXT_SUFFIXES:
        x, y, z, file_crs = _read_text(path, key)
    else:
        raise InputDataError(
            f"unknown DEM format '{suffix}'",
            file=path,
            key=key,
            fix="use NetCDF (.nc), GeoTIFF (.tif) or an x,y,z table (.xyz)",
        )
    if dem_crs:
        source = _parse_crs(dem_crs, path, "reference.dem_crs")
    elif file_crs is not None:
        source = file_crs
    else:
        source = None
        geographic_values = _looks_geographic(x, y)
        if target.is_projected and geographic_values:
            raise CRSError(
                "the DEM has no CRS and its coordinates look like degrees while the survey CRS is projected",
                file=path,
                key="reference.dem_crs",
                fix='declare the DEM CRS, e.g. dem_crs = "EPSG:4326"',
            )
        if target.is_geographic and not geographic_values:
            raise CRSError(
                "the DEM has no CRS and its coordinates are not degrees",
                file=path,
                key="reference.dem_crs",
                fix="declare the DEM CRS",
            )
        source = target
    if np.all(~np.isfinite(z)):
        raise InputDataError(
            "DEM holds no valid elevation", file=path, key=key, fix="check the no-data value and the file"
        )
    # ascending axes
    if x[0] > x[-1]:
        x, z = x[::-1], z[:, ::-1]
    if y[0] > y[-1]:
        y, z = y[::-1], z[::-1, :]
    if not source.equals(target, ignore_axis_order=True):
        x, y, z = _resample(x, y, z, source, target, path, max_cells)
    grid = make_grid(
        x, y, z, name="elevation", units="m", long_name="DEM elevation", history=f"read from {path.name}"
    )
    grid.attrs.update({"crs": target.to_wkt(), "source_crs": source.to_string(), "source": str(path)})
    return grid


def _parse_crs(value, path, key) -> pyproj.CRS:
    try:
        return pyproj.CRS.from_user_input(value)
    except pyproj.exceptions.CRSError:
        raise CRSError(
            f"'{value}' is not a CRS that pyproj understands",
            file=path,
            key=key,
            fix='use an EPSG code such as "EPSG:32633" or a PROJ string',
        ) from None


def _looks_geographic(x, y) -> bool:
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    return bool(
        np.nanmax(np.abs(x)) <= 360.0 and np.nanmax(np.abs(y)) <= 90.0 and np.nanmax(np.abs(np.diff(x))) < 1.0
    )


def _check_regular(coord, path, key, what):
    if coord.size < 2:
        raise InputDataError(
            f"DEM has fewer than 2 {what} values",
            file=path,
            key=key,
            fix="use a DEM grid of at least 2 x 2 cells",
        )
    step = np.diff(coord)
    if np.any(step == 0) or np.ptp(step) > 1e-6 * np.max(np.abs(step)) + 1e-12:
        raise InputDataError(
            f"DEM {what} coordinates are not evenly spaced",
            file=path,
            key=key,
            fix="resample the DEM onto a regular grid",
        )


# --- GeoTIFF ---------------------------------------------------------------------------------
def _read_geotiff(path, key):
    import rioxarray

    try:
        da = rioxarray.open_rasterio(path, masked=True)
    except Exception as err:  # rasterio raises several types for a bad file
        raise InputDataError(
            f"cannot read GeoTIFF ({type(err).__name__})",
            file=path,
            key=key,
            fix="check that the file is a valid GeoTIFF",
        ) from None
    with da:
        if "band" in da.dims:
            da = da.isel(band=0)
        file_crs = da.rio.crs
        x = np.asarray(da["x"].values, dtype=float)
        y = np.asarray(da["y"].values, dtype=float)
        z = np.asarray(da.transpose("y", "x").values, dtype=float)
    crs = pyproj.CRS.from_wkt(file_crs.to_wkt()) if file_crs is not None else None
    _check_regular(x, path, key, "x")
    _check_regular(y, path, key, "y")
    return x, y, z, crs


# --- NetCDF ----------------------------------------------------------------------------------
def _open_netcdf(path, key):
    for engine in ("netcdf4", "h5netcdf", "scipy"):
        try:
            return xr.open_dataset(path, engine=engine, mask_and_scale=True)
        except Exception:  # not readable by this engine (or engine missing): try the next
            continue
    raise InputDataError(
        "cannot read NetCDF file", file=path, key=key, fix="check that the file is NetCDF (3 or 4)"
    )


def _axis_name(ds, var, names, axis_letter, std_names):
    for dim in var.dims:
        coord = ds[dim] if dim in ds.variables else None
        attrs = coord.attrs if coord is not None else {}
        if (
            dim.lower() in names
            or attrs.get("axis", "").upper() == axis_letter
            or attrs.get("standard_name", "") in std_names
        ):
            return dim
    return None


def _read_netcdf(path, key):
    with _open_netcdf(path, key) as ds:
        candidates = [
            name
            for name, v in ds.data_vars.items()
            if v.ndim >= 2 and np.issubdtype(v.dtype, np.number) and sum(s > 1 for s in v.shape) == 2
        ]
        if not candidates:
            raise InputDataError(
                "no 2-D variable in the NetCDF file",
                file=path,
                key=key,
                fix="give a NetCDF DEM with one elevation grid",
            )
        preferred = [
            c
            for c in candidates
            if c.lower() in ("elevation", "z", "height", "topo", "topography", "dem", "band1")
        ]
        name = (preferred or candidates)[0]
        var = ds[name]
        var = var.squeeze(drop=True)
        xname = _axis_name(ds, var, _X_NAMES, "X", ("projection_x_coordinate", "longitude", "grid_longitude"))
        yname = _axis_name(ds, var, _Y_NAMES, "Y", ("projection_y_coordinate", "latitude", "grid_latitude"))
        if xname is None or yname is None or xname == yname:
            dims = ", ".join(var.dims)
            raise InputDataError(
                f"cannot tell the x and y coordinates of '{name}' ({dims})",
                file=path,
                key=key,
                fix="name the coordinates x/y (or easting/northing, lon/lat) or give them CF axis attributes",
            )
        x = np.asarray(ds[xname].values, dtype=float)
        y = np.asarray(ds[yname].values, dtype=float)
        z = np.asarray(var.transpose(yname, xname).values, dtype=float)
        crs = None
        mapping = var.attrs.get("grid_mapping") or var.encoding.get("grid_mapping")
        if mapping and mapping in ds.variables:
            attrs = dict(ds[mapping].attrs)
            try:
                crs = pyproj.CRS.from_cf(attrs)
            except Exception:
                wkt = attrs.get("crs_wkt") or attrs.get("spatial_ref")
                crs = pyproj.CRS.from_user_input(wkt) if wkt else None
        if crs is None:
            for attrs in (var.attrs, ds.attrs):
                wkt = attrs.get("crs_wkt") or attrs.get("spatial_ref") or attrs.get("crs")
                if isinstance(wkt, str) and wkt.strip():
                    try:
                        crs = pyproj.CRS.from_user_input(wkt)
                        break
                    except pyproj.exceptions.CRSError:
                        continue
        if crs is None:
            xu = str(ds[xname].attrs.get("units", "")).lower()
            yu = str(ds[yname].attrs.get("units", "")).lower()
            if xu.startswith("degree") and yu.startswith("degree"):
                crs = pyproj.CRS.from_epsg(4326)
    _check_regular(x, path, key, xname)
    _check_regular(y, path, key, yname)
    return x, y, z, crs


# --- x,y,z text ------------------------------------------------------------------------------
def _read_text(path, key):
    try:
        table = pd.read_csv(path, sep=None, engine="python", header=None, comment="#", skip_blank_lines=True)
    except pd.errors.EmptyDataError:
        raise InputDataError(
            "DEM file is empty", file=path, key=key, fix="point reference.dem_file at a valid DEM"
        ) from None
    except Exception as err:
        raise InputDataError(
            f"cannot read the x,y,z table ({type(err).__name__})",
            file=path,
            key=key,
            fix="give three columns x y z",
        ) from None
    numeric = table.apply(pd.to_numeric, errors="coerce")
    # a header line (text) becomes NaN: drop leading non-numeric rows
    if len(numeric) and numeric.iloc[0].isna().all():
        numeric = numeric.iloc[1:]
    if numeric.shape[1] < 3:
        raise InputDataError(
            f"x,y,z table has {numeric.shape[1]} columns",
            file=path,
            key=key,
            fix="give three columns x y z (comma, tab or space separated)",
        )
    numeric = numeric.iloc[:, :3]
    bad = numeric.iloc[:, :2].isna().any(axis=1).to_numpy()
    if bad.any():
        row = int(np.flatnonzero(bad)[0]) + 1
        raise InputDataError(
            "x or y is not a number",
            file=path,
            row=row,
            key=key,
            fix="every line must hold three numbers x y z",
        )
    data = numeric.to_numpy(dtype=float)
    if data.shape[0] < 4:
        raise InputDataError(
            "x,y,z table has fewer than 4 points",
            file=path,
            key=key,
            fix="give a DEM grid of at least 2 x 2 nodes",
        )
    xs, ix = np.unique(data[:, 0], return_inverse=True)
    ys, iy = np.unique(data[:, 1], return_inverse=True)
    _check_regular(xs, path, key, "x")
    _check_regular(ys, path, key, "y")
    z = np.full((ys.size, xs.size), np.nan)
    z[iy, ix] = data[:, 2]
    if np.isnan(z).sum() > 0.5 * z.size:
        raise InputDataError(
            "x,y,z points do not fill a regular grid",
            file=path,
            key=key,
            fix="give one z for every node of a regular x,y grid",
        )
    return xs, ys, z, None


# --- reprojection ----------------------------------------------------------------------------
def _resample(x, y, z, source, target, path, max_cells):
    """Resample a (y, x) grid from ``source`` to a regular grid in ``target`` (bilinear)."""
    from scipy.interpolate import RegularGridInterpolator

    forward = pyproj.Transformer.from_crs(source, target, always_xy=True)
    inverse = pyproj.Transformer.from_crs(target, source, always_xy=True)
    # boundary of the DEM, densified, to find the target extent
    edge = np.linspace(0.0, 1.0, 101)
    bx = np.concatenate(
        [x[0] + (x[-1] - x[0]) * edge, np.full(101, x[-1]), x[-1] - (x[-1] - x[0]) * edge, np.full(101, x[0])]
    )
    by = np.concatenate(
        [np.full(101, y[0]), y[0] + (y[-1] - y[0]) * edge, np.full(101, y[-1]), y[-1] - (y[-1] - y[0]) * edge]
    )
    tx, ty = forward.transform(bx, by)
    if not (np.all(np.isfinite(tx)) and np.all(np.isfinite(ty))):
        raise CRSError(
            "the DEM cannot be transformed to the survey CRS",
            file=path,
            key="reference.dem_crs",
            fix="check reference.dem_crs and the DEM extent",
        )
    # native spacing in target units, measured at the DEM centre
    xc, yc = 0.5 * (x[0] + x[-1]), 0.5 * (y[0] + y[-1])
    dx, dy = x[1] - x[0], y[1] - y[0]
    px, py = forward.transform([xc, xc + dx, xc], [yc, yc, yc + dy])
    step = min(np.hypot(px[1] - px[0], py[1] - py[0]), np.hypot(px[2] - px[0], py[2] - py[0]))
    if not np.isfinite(step) or step <= 0:
        raise CRSError(
            "cannot work out the DEM spacing in the survey CRS",
            file=path,
            key="reference.dem_crs",
            fix="check reference.dem_crs",
        )
    x0, x1 = np.floor(tx.min() / step) * step, np.ceil(tx.max() / step) * step
    y0, y1 = np.floor(ty.min() / step) * step, np.ceil(ty.max() / step) * step
    gx = np.arange(x0 + step / 2, x1, step)
    gy = np.arange(y0 + step / 2, y1, step)
    if gx.size * gy.size > max_cells:
        raise InputDataError(
            f"the reprojected DEM would have {gx.size * gy.size} cells",
            file=path,
            key="reference.dem_file",
            fix="crop or coarsen the DEM to the terrain radius",
        )
    interp = RegularGridInterpolator((y, x), z, method="linear", bounds_error=False, fill_value=np.nan)
    out = np.empty((gy.size, gx.size))
    rows = max(1, 2_000_000 // max(gx.size, 1))
    for start in range(0, gy.size, rows):  # chunks of rows bound the memory
        sy = gy[start : start + rows]
        mx, my = np.meshgrid(gx, sy)
        sx_, sy_ = inverse.transform(mx.ravel(), my.ravel())
        out[start : start + sy.size] = interp(np.column_stack([sy_, sx_])).reshape(mx.shape)
    return gx, gy, out
