"""separate stage: separation of sources.

Glue only; the methods are in :mod:`potfield.fields.harmonic.separation` and
:mod:`potfield.fields.harmonic.spherical`.

Magnetic and gravity surveys (needs the grid stage's ``anomaly`` or ``bouguer_anomaly`` grid)
    Regional and residual by upward continuation to ``[separate] regional_height_m`` (Jacobsen
    1987; by predicting the grid stage's equivalent-source model at the higher surface when
    there is one, else by FFT) and/or by two equivalent-source layers (the deep layer is the
    regional). Grids ``regional_upward``, ``residual_upward``, ``regional_two_layer``,
    ``residual_two_layer``; columns ``regional`` and ``residual`` (from the first method) at
    each reading. With vector columns ``mag_north``, ``mag_east``, ``mag_down`` (magnetic
    surveys), the components are gridded and split into the parts of sources below and above
    the survey plane (Weaver 1964; Porath, Oldenburg and Gough 1970): grids and columns
    ``internal_north`` ... ``external_down``. Without a grid the stage passes through with a note.

Observatory surveys
    Gauss coefficients of the internal and external potentials at every epoch from the
    stations' disturbance (``disturbance_north/east/down`` of the reference stage) (Gauss 1839;
    Chapman and Bartels 1940; Olsen, Glassmeier and Jia 2010): tables ``coefficients`` and
    ``station_residuals``, columns ``sep_internal_*``, ``sep_external_*``, ``sep_residual_*``,
    the induced/external ratio g10/q10 and a residual check.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..errors import ConfigError, InputDataError, StageError
from ..fields._numerics import sample_grid
from ..fields.errors import BadParameter, FieldError, IllPosed, NotEnoughData
from ..fields.harmonic import separation as sep
from ._boundary import Rule, translate
from .base import (
    ANOMALY_COLUMN,
    Check,
    Contract,
    Stage,
    StageContext,
    StageOutput,
    main_grid_names,
    usable,
    value_column,
)
from .gridmodel import grid_height, load_grid_model

VECTOR = ("mag_north", "mag_east", "mag_down")
COMPONENTS = ("north", "east", "down")


# ----------------------------------------------------------------------------------------------
# observatory networks
# ----------------------------------------------------------------------------------------------
def _disturbance(table: pd.DataFrame, comp: str) -> np.ndarray:
    column = f"disturbance_{comp}"
    if column in table.columns:
        return table[column].to_numpy(dtype=float)
    if f"mag_{comp}" in table.columns and f"igrf_{comp}" in table.columns:
        return table[f"mag_{comp}"].to_numpy(dtype=float) - table[f"igrf_{comp}"].to_numpy(dtype=float)
    raise StageError(
        f"the readings table has no '{column}' column (nor mag_{comp} and igrf_{comp})",
        key="input.columns",
        fix="map the stations' X, Y, Z columns to mag_north, mag_east, mag_down and run the "
        "reference stage before separate",
    )


def run_observatory(ctx: StageContext) -> StageOutput:
    """Internal/external separation on the sphere for an observatory network.

    Parameters
    ----------
    ctx : StageContext
        Table with ``station``, ``time``, ``longitude``, ``latitude``, ``height`` and
        ``disturbance_north/east/down`` (observed minus IGRF-14, reference stage).

    Returns
    -------
    StageOutput

    References
    ----------
    Gauss (1839); Chapman and Bartels (1940), Geomagnetism, Oxford; Olsen, Glassmeier and Jia
    (2010), Space Sci. Rev. 152:135.
    """
    cfg = ctx.config.separate
    table = ctx.table
    if table is None:
        raise StageError("no readings table", fix="run the ingest stage first")
    for name in ("time", "longitude", "latitude", "height"):
        if name not in table.columns:
            raise StageError(
                f"the readings table has no '{name}' column",
                key="input.columns",
                fix=f"map a column to '{name}' in survey.toml",
            )
    station_col = "station" if "station" in table.columns else "line"
    values = {c: _disturbance(table, c) for c in COMPONENTS}
    ok = usable(table)
    for c in COMPONENTS:
        values[c] = np.where(ok, values[c], np.nan)
    st_codes, st_names = pd.factorize(table[station_col].astype(str), sort=True)
    t_codes, t_unique = pd.factorize(table["time"], sort=True)
    n_t, n_s = len(t_unique), len(st_names)
    positions = (
        pd.DataFrame(
            {
                "station": st_codes,
                "longitude": table["longitude"].to_numpy(float),
                "latitude": table["latitude"].to_numpy(float),
                "height": table["height"].to_numpy(float),
            }
        )
        .groupby("station")
        .median()
        .sort_index()
    )
    arrays = {}
    for c in COMPONENTS:
        grid = np.full((n_t, n_s), np.nan)
        grid[t_codes, st_codes] = values[c]
        arrays[c] = grid
    has_data = np.any([np.isfinite(arrays[c]).any(axis=0) for c in COMPONENTS], axis=0)
    baselines = {c: np.zeros(n_s) for c in COMPONENTS}
    if cfg.station_baseline == "median":  # the station's crustal bias and baseline error
        for c in COMPONENTS:
            col = np.isfinite(arrays[c]).any(axis=0)
            baselines[c][col] = np.nanmedian(arrays[c][:, col], axis=0)
            arrays[c] = arrays[c] - baselines[c][None, :]
        # the median of a sum is not the sum of the medians: the station medians leave each
        # station a constant misfit to any potential field. Refine each baseline by the median
        # of its residual to the fit and fit again (twice): baselines and coefficients jointly
        for _ in range(2):
            first = _fit(cfg, arrays, positions, st_names)
            for k, c in enumerate(COMPONENTS):
                col = np.isfinite(first.residual[k]).any(axis=0)
                shift = np.zeros(n_s)
                shift[col] = np.nanmedian(first.residual[k][:, col], axis=0)
                baselines[c] += shift
                arrays[c] = arrays[c] - shift[None, :]
    out = StageOutput(table=table.copy(deep=False))
    ctx.progress(f"Gauss coefficients at {n_t} epochs from {int(has_data.sum())} stations")
    fit, rejected, station_rms, zscore = _fit_rejecting(cfg, arrays, positions, st_names, has_data)
    # residuals at every station, the rejected ones included (their data were left out of the fit)
    residual = [
        np.stack([arrays[c] for c in COMPONENTS])[k] - fit.internal[k] - fit.external[k] for k in range(3)
    ]
    new = out.table
    for k, c in enumerate(COMPONENTS):
        new[f"sep_internal_{c}"] = fit.internal[k][t_codes, st_codes]
        new[f"sep_external_{c}"] = fit.external[k][t_codes, st_codes]
        new[f"sep_residual_{c}"] = residual[k][t_codes, st_codes]
    out.tables["coefficients"] = sep.coefficient_table(np.asarray(t_unique, dtype="datetime64[ns]"), fit)

    rows = {
        "station": list(st_names),
        "longitude": positions["longitude"].to_numpy(),
        "latitude": positions["latitude"].to_numpy(),
        "height": positions["height"].to_numpy(),
    }
    for c in COMPONENTS:
        rows[f"baseline_{c}"] = np.where(has_data, baselines[c], np.nan)
    rows["has_data"] = has_data
    rows["rms_left_out"] = station_rms
    rows["outlier_z"] = zscore
    rows["rejected"] = rejected
    for k, c in enumerate(COMPONENTS):
        res = residual[k]
        count = np.isfinite(res).sum(axis=0)
        with np.errstate(invalid="ignore"):
            rows[f"rms_{c}"] = np.sqrt(np.nansum(res**2, axis=0) / np.maximum(count, 1))
            rows[f"mean_{c}"] = np.nansum(res, axis=0) / np.maximum(count, 1)
        rows[f"rms_{c}"][count == 0] = np.nan
        rows[f"mean_{c}"][count == 0] = np.nan
        rows[f"epochs_{c}"] = count
    out.tables["station_residuals"] = pd.DataFrame(rows)

    metrics = {
        "stations": int(has_data.sum()),
        "epochs": int(n_t),
        "groups": fit.groups,
        "unsolved_epochs": fit.unsolved_epochs,
        "condition_number": fit.condition,
        "internal_degree": cfg.internal_degree,
        "external_degree": cfg.external_degree,
        "damping": cfg.damping,
    }
    metrics["station_baseline"] = cfg.station_baseline
    metrics["stations_without_data"] = [str(x) for x in np.asarray(st_names)[~has_data]]
    metrics["rejected_stations"] = [str(x) for x in np.asarray(st_names)[rejected]]
    if (~has_data).any():
        out.notes.append(
            f"stations with no valid data (not counted): {', '.join(metrics['stations_without_data'])}"
        )
    if rejected.any():
        names = ", ".join(
            f"{st_names[i]} (left-out RMS {station_rms[i]:.2f} nT, modified z {zscore[i]:.1f})"
            for i in np.flatnonzero(rejected)
        )
        out.warnings.append(
            f"degraded: station(s) left out of the separation as outliers: {names}; "
            f"limit [separate] station_outlier_z = {cfg.station_outlier_z:g}. Check "
            "their baselines, orientation and timing"
        )
    if cfg.station_baseline == "median":
        out.notes.append(
            "each station's median (per component) removed before the fit: the "
            "coefficients are variations about the run's median level"
        )
    all_res = []
    for k, c in enumerate(COMPONENTS):
        res = fit.residual[k][np.isfinite(fit.residual[k])]
        metrics[f"residual_rms_{c}_nT"] = float(np.sqrt(np.mean(res**2))) if res.size else float("nan")
        all_res.append(res)
    all_res = np.concatenate(all_res)
    overall = float(np.sqrt(np.mean(all_res**2))) if all_res.size else float("nan")
    metrics["residual_rms_nT"] = overall
    state = {
        "coefficients": fit.names,
        "internal_degree": cfg.internal_degree,
        "external_degree": cfg.external_degree,
        "stations": {
            str(s): {
                "longitude": float(positions["longitude"].iloc[i]),
                "latitude": float(positions["latitude"].iloc[i]),
                "height": float(positions["height"].iloc[i]),
            }
            for i, s in enumerate(st_names)
        },
    }
    if "g10" in fit.names and "q10" in fit.names:
        ratio = sep.induction_ratio(fit.coefficient("g10"), fit.coefficient("q10"))
        metrics.update(
            {
                "induction_ratio_g10_q10": ratio["ratio"],
                "induction_offset_g10_nT": ratio["offset"],
                "induction_correlation": ratio["correlation"],
            }
        )
        state["induction_ratio_g10_q10"] = ratio["ratio"]
        out.notes.append(
            f"induced/external ratio g10/q10 = {ratio['ratio']:.3f} (regression over "
            f"{ratio['epochs']} epochs, correlation {ratio['correlation']:.3f})"
        )
    tol, source = ctx.tolerance("separation_residual_rms_nT", 5.0)
    out.checks.append(
        Check.at_most(
            "separation_residual_rms_nT",
            overall,
            tol,
            "nT",
            source,
            detail=f"RMS of station residuals after the degree {cfg.internal_degree} internal + "
            f"degree {cfg.external_degree} external fit (non-potential part, noise, higher "
            "degrees)",
        )
    )
    if fit.unsolved_epochs:
        out.warnings.append(
            f"{fit.unsolved_epochs} epoch(s) had too few stations to resolve the "
            "coefficients: NaN in the coefficients table"
        )
    if cfg.index_file:
        table_idx, idx_metrics = _index_comparison(ctx, out.tables["coefficients"])
        out.tables["index_comparison"] = table_idx
        metrics.update(idx_metrics)
        out.notes.append(
            f"q10 against the hourly index '{cfg.index_column}' over {idx_metrics['index_hours']} "
            f"hours: correlation {idx_metrics['index_correlation']:.3f}, slope "
            f"{idx_metrics['index_slope_nT_per_unit']:.3f} nT per index unit"
        )
    out.notes.append(
        f"{len(fit.names)} Gauss coefficients at {n_t} epochs ({fit.groups} station "
        f"set(s)); residual RMS {overall:.2f} nT"
    )
    out.metrics, out.state = metrics, state
    return out


def _fit(cfg, arrays, positions, st_names):
    with translate(
        {
            IllPosed: Rule(
                InputDataError,
                key="separate.damping",
                fix=(
                    "add stations spread in longitude and latitude, lower the degrees, or set a damping > 0"
                ),
            ),
            FieldError: Rule(InputDataError, key="separate.internal_degree"),
        }
    ):
        return sep.fit_gauss_coefficients(
            arrays["north"],
            arrays["east"],
            arrays["down"],
            positions["longitude"].to_numpy(),
            positions["latitude"].to_numpy(),
            positions["height"].to_numpy(),
            internal_degree=cfg.internal_degree,
            external_degree=cfg.external_degree,
            damping=cfg.damping,
            stations=list(st_names),
        )


def _station_rms(fit) -> np.ndarray:
    res = np.concatenate([fit.residual[k] for k in range(3)], axis=0)
    count = np.isfinite(res).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rms = np.sqrt(np.nansum(res**2, axis=0) / count)
    return np.where(count > 0, rms, np.nan)


def _leave_one_out_rms(cfg, arrays, positions, st_names, has_data) -> np.ndarray:
    """RMS misfit of each station to the model fitted without it (its prediction error): in a
    small network a faulty station pulls the fit towards itself and spreads its error over the
    others, so its own fitted residual understates it; left out, it does not (cross-validation,
    common practice)."""
    from ..errors import PotfieldError

    rms = np.full(has_data.size, np.nan)
    for i in np.flatnonzero(has_data):  # one fit per station (a network has tens of stations)
        kept = {c: arrays[c].copy() for c in COMPONENTS}
        for c in COMPONENTS:
            kept[c][:, i] = np.nan
        try:
            fit = _fit(cfg, kept, positions, st_names)
        except PotfieldError:  # the network cannot be solved without this station
            continue
        res = np.concatenate(
            [
                arrays[c][:, i] - fit.internal[k][:, i] - fit.external[k][:, i]
                for k, c in enumerate(COMPONENTS)
            ]
        )
        res = res[np.isfinite(res)]
        if res.size:
            rms[i] = float(np.sqrt(np.mean(res**2)))
    return rms


def _fit_rejecting(cfg, arrays, positions, st_names, has_data):
    """Fit; score each station by the modified z-score ``0.6745 (x - median) / MAD`` (Iglewicz
    and Hoaglin 1993, How to Detect and Handle Outliers, ASQC) of its leave-one-out residual RMS
    (:func:`_leave_one_out_rms`), leave out the stations above ``station_outlier_z`` (high side
    only: a station that fits unusually badly) and fit again. Needs five stations with data; at
    most a third are left out."""
    fit = _fit(cfg, arrays, positions, st_names)
    n_s = has_data.size
    rms = np.full(n_s, np.nan)
    z = np.full(n_s, np.nan)
    rejected = np.zeros(n_s, dtype=bool)
    if cfg.station_outlier_z > 0 and has_data.sum() >= 5:
        rms = _leave_one_out_rms(cfg, arrays, positions, st_names, has_data)
    valid = has_data & np.isfinite(rms)
    if cfg.station_outlier_z > 0 and valid.sum() >= 5:
        med = float(np.median(rms[valid]))
        mad = float(np.median(np.abs(rms[valid] - med)))
        mad = max(mad, 1e-3 * med, 1e-9)
        z[valid] = 0.6745 * (rms[valid] - med) / mad
        rejected = valid & (z > cfg.station_outlier_z)
        limit = int(valid.sum()) // 3
        if rejected.sum() > limit:  # keep the worst third at most
            order = np.argsort(-np.nan_to_num(np.where(rejected, z, -np.inf), neginf=-np.inf))
            rejected[:] = False
            rejected[order[:limit]] = True
        if rejected.any():
            kept = {c: np.where(rejected[None, :], np.nan, arrays[c]) for c in COMPONENTS}
            fit = _fit(cfg, kept, positions, st_names)
    return fit, rejected, rms, z


def _index_comparison(ctx: StageContext, coefficients: pd.DataFrame):
    """Hourly means of q10 against an hourly index: Pearson correlation and the least-squares
    line q10 = offset + slope x index (common practice: the degree-1 external coefficient
    follows the ring-current index; Olsen, Glassmeier and Jia 2010, Space Sci. Rev. 152:135)."""
    cfg = ctx.config.separate
    path = ctx.survey.resolve(cfg.index_file)
    if not path.is_file():
        raise InputDataError(
            "index file not found",
            file=path,
            key="separate.index_file",
            fix="check the file name under [separate] index_file",
        )
    if not cfg.index_column:
        raise ConfigError(
            "index_file is set but index_column is not",
            key="separate.index_column",
            fix='set index_column = "<column name>" under [separate]',
        )
    if "q10" not in coefficients.columns:
        raise ConfigError(
            "the index comparison needs the degree-1 external coefficient q10",
            key="separate.external_degree",
            fix="set external_degree >= 1",
        )
    try:
        frame = pd.read_csv(path, sep=None, engine="python", comment="#")
    except (ValueError, pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputDataError(
            f"cannot read the index file ({exc.__class__.__name__})",
            file=path,
            fix="give a delimited text table with a header line",
        ) from None
    for name, key in ((cfg.index_time_column, "index_time_column"), (cfg.index_column, "index_column")):
        if name not in frame.columns:
            raise InputDataError(
                f"no column '{name}' in the index file (columns: {', '.join(map(str, frame.columns))})",
                file=path,
                key=f"separate.{key}",
                fix="set the column name under [separate]",
            )
    times = pd.to_datetime(frame[cfg.index_time_column], utc=True, errors="coerce")
    value = pd.to_numeric(frame[cfg.index_column], errors="coerce")
    bad = int(times.isna().sum())
    if bad:
        row = int(np.flatnonzero(times.isna().to_numpy())[0]) + 2
        raise InputDataError(
            f"cannot read the time '{frame[cfg.index_time_column].iloc[row - 2]}'",
            file=path,
            row=row,
            key="separate.index_time_column",
            fix="use ISO 8601 times, e.g. 2025-05-10T13:00:00Z",
        )
    index = (
        pd.Series(value.to_numpy(float), index=times.dt.tz_localize(None).dt.floor("h").to_numpy())
        .groupby(level=0)
        .mean()
    )
    q10 = coefficients.set_index("time")["q10"].astype(float)
    hourly = q10.groupby(q10.index.floor("h")).mean()
    joined = pd.DataFrame({"index": index, "q10_hourly_mean": hourly}).dropna()
    if len(joined) < 3:
        raise InputDataError(
            f"only {len(joined)} hours of the index file overlap the coefficients",
            file=path,
            key="separate.index_file",
            fix="give an index covering the observatory data's days",
        )
    x, y = joined["index"].to_numpy(), joined["q10_hourly_mean"].to_numpy()
    slope, offset = np.polyfit(x, y, 1)
    r = float(np.corrcoef(x, y)[0, 1]) if np.std(x) > 0 and np.std(y) > 0 else float("nan")
    joined["q10_fitted"] = offset + slope * x
    joined = joined.rename_axis("time").reset_index()
    return joined, {
        "index_hours": len(joined),
        "index_correlation": r,
        "index_slope_nT_per_unit": float(slope),
        "index_offset_nT": float(offset),
    }


# ----------------------------------------------------------------------------------------------
# survey grids
# ----------------------------------------------------------------------------------------------
def _main_grid(ctx: StageContext):
    for name in main_grid_names(ctx.config.kind):
        if name in ctx.grids:
            return name, ctx.grids[name].transpose("northing", "easting")
    return None, None


def _value_column(ctx: StageContext, table: pd.DataFrame) -> str | None:
    """The column the grid stage gridded (:func:`potfield.stages.base.value_column`)."""
    return value_column(table, ctx.config.kind, ctx.state)


def _decimate(grid, limit: int):
    """Every ``step``-th cell of a grid so that at most ``limit`` finite cells remain."""
    finite = int(np.isfinite(grid.values).sum())
    step = max(1, int(math.ceil(math.sqrt(finite / limit))))
    return grid.isel(northing=slice(None, None, step), easting=slice(None, None, step)), step


def _two_layer(ctx, grid, height, out):
    cfg = ctx.config.separate
    small, step = _decimate(grid, cfg.two_layer_max_data)
    ee, nn = np.meshgrid(small.easting.values, small.northing.values)
    if np.ndim(height) == 2:
        uu = np.asarray(height)[::step, ::step]
    else:
        uu = np.full(ee.shape, float(height))
    spacing = float(abs(small.easting.values[1] - small.easting.values[0]))
    deep = cfg.deep_depth_m or cfg.regional_height_m
    shallow = cfg.shallow_depth_m or 3.0 * spacing
    if shallow >= deep and not (cfg.deep_depth_m or cfg.shallow_depth_m):
        # both defaults: a large grid decimated to two_layer_max_data cells has coarse cells, so
        # its shallow layer (3 cells deep) sinks below the regional height; keep the deep layer
        # twice as deep and say so
        out.warnings.append(
            f"two-layer split: the decimated grid's {spacing:g} m cells put the shallow layer at "
            f"{shallow:g} m, below regional_height_m; the deep layer was moved to {2 * shallow:g} m "
            "(set [separate] deep_depth_m and shallow_depth_m, or raise two_layer_max_data)"
        )
        deep = 2.0 * shallow
    if shallow >= deep:
        raise StageError(
            f"the two-layer shallow depth {shallow:g} m is not above the deep depth {deep:g} m",
            key="separate.shallow_depth_m",
            fix="set shallow_depth_m below deep_depth_m",
        )
    crossover = cfg.crossover_wavelength_m or 3.0 * cfg.regional_height_m
    ctx.progress(f"two-layer equivalent sources on {int(np.isfinite(small.values).sum())} cells")
    with translate(
        {
            BadParameter: Rule(
                InputDataError,
                key="separate.deep_depth_m",
                fix="set deep_depth_m larger than shallow_depth_m",
            ),
            NotEnoughData: Rule(InputDataError, fix="grid the survey first (the separation needs the grid)"),
        }
    ):
        model = sep.fit_two_layer(
            (ee, nn, uu),
            small.values,
            deep_depth=deep,
            shallow_depth=shallow,
            deep_damping=cfg.deep_damping,
            shallow_damping=cfg.shallow_damping,
            crossover_wavelength=crossover,
        )
    EE, NN = np.meshgrid(grid.easting.values, grid.northing.values)
    UU = np.broadcast_to(np.asarray(height, dtype=float), EE.shape)
    values = np.where(np.isfinite(grid.values), model.predict_regional((EE, NN, UU)), np.nan)
    units = grid.attrs.get("units", "")
    regional = grid.copy(data=values).rename("regional_two_layer")
    regional.attrs = {
        "units": units,
        "long_name": "regional field: deep equivalent-source layer",
        "history": grid.attrs.get("history", "") + f"; two-layer equivalent sources "
        f"(deep {deep:g} m, shallow {shallow:g} m, crossover {crossover:g} m)",
    }
    residual = (grid - regional).rename("residual_two_layer")
    residual.attrs = {
        "units": units,
        "long_name": "residual field: field minus the deep layer",
        "history": regional.attrs["history"] + "; residual = field - regional",
    }
    out.metrics.update(
        {
            "two_layer_deep_depth_m": deep,
            "two_layer_shallow_depth_m": shallow,
            "two_layer_crossover_m": crossover,
            "two_layer_fit_rms": model.rms,
            "two_layer_decimation": step,
            "two_layer_shallow_damping": model.shallow_damping,
        }
    )
    return model, regional, residual


def _vector(ctx, table, grid, height, out):
    """Grid the vector components and split them into internal and external parts."""
    from ..fields.harmonic.eqsources import fit_equivalent_sources

    cfg = ctx.config.separate
    ok = usable(table)
    e, n, u = (table[c].to_numpy(dtype=float) for c in ("easting", "northing", "height"))
    EE, NN = np.meshgrid(grid.easting.values, grid.northing.values)
    UU = np.broadcast_to(np.asarray(height, dtype=float), EE.shape)
    spacing = float(abs(grid.easting.values[1] - grid.easting.values[0]))
    mask = np.isfinite(grid.values)
    record = ctx.state.get("grid", {})  # the grid stage's cross-validated depth and damping
    depth = record.get("depth") if isinstance(record.get("depth"), (int, float)) else "default"
    damping = record.get("damping") if isinstance(record.get("damping"), (int, float)) else 1e-3
    grids = []
    for comp in COMPONENTS:  # three components
        v = table[f"mag_{comp}"].to_numpy(dtype=float)
        keep = ok & np.isfinite(v) & np.isfinite(e) & np.isfinite(n) & np.isfinite(u)
        if keep.sum() < 10:
            raise StageError(
                f"only {int(keep.sum())} usable readings have mag_{comp}",
                key=f"input.columns.mag_{comp}",
                fix="check the vector columns of the input files",
            )
        model = fit_equivalent_sources(
            e[keep], n[keep], u[keep], v[keep], depth=depth, damping=damping, block_size=spacing
        )
        values = np.where(mask, model.predict((EE, NN, UU)), np.nan)
        grids.append(grid.copy(data=values).rename(f"mag_{comp}"))
    with translate(
        {
            BadParameter: Rule(InputDataError, key="separate.uniform_part"),
            NotEnoughData: Rule(InputDataError, fix="check the mag_north, mag_east and mag_down columns"),
            FieldError: InputDataError,
        }
    ):
        parts = sep.separate_vector_plane(
            *grids, uniform=cfg.uniform_part, pad_fraction=cfg.pad_fraction, pad_mode=cfg.pad_mode
        )
    new = out.table
    for name, part in parts.items():
        out.grids[name] = part
        new[name] = sample_grid(part, e, n)
        vals = part.values[np.isfinite(part.values)]
        out.metrics[f"{name}_rms_nT"] = (
            float(np.sqrt(np.mean((vals - vals.mean()) ** 2))) if vals.size else float("nan")
        )
    out.notes.append(
        "vector components gridded by equivalent sources and split into the fields "
        f"of sources below and above the survey (uniform part to the "
        f"{cfg.uniform_part} side; grid north taken as true north)"
    )


def run_grids(ctx: StageContext) -> StageOutput:
    """Regional/residual (and vector internal/external) separation of a survey's grid.

    Parameters
    ----------
    ctx : StageContext
        ``ctx.grids["anomaly"]`` (magnetic) or ``["bouguer_anomaly"]`` (gravity) from the grid
        stage, ``ctx.state["grid"]`` (``model_path``, ``height``), the readings table.

    Returns
    -------
    StageOutput

    References
    ----------
    Jacobsen (1987), Geophysics 52:1138; Dampney (1969), Geophysics 34:39; Cordell (1992),
    Geophysics 57:629; Weaver (1964), Z. Geophys. 30:29; Porath, Oldenburg and Gough (1970),
    Geophys. J. R. Astr. Soc. 19:237.
    """
    cfg = ctx.config.separate
    table = ctx.table
    name, grid = _main_grid(ctx)
    if grid is None:
        return StageOutput(
            notes=["no grid from the grid stage (not available or nothing gridded): separation skipped"]
        )
    out = StageOutput(table=None if table is None else table.copy(deep=False))
    present = [c for c in VECTOR if table is not None and c in table.columns]
    if ctx.config.kind == "magnetic" and 0 < len(present) < 3:
        missing = [c for c in VECTOR if c not in present]
        raise StageError(
            f"vector separation needs mag_north, mag_east and mag_down; {', '.join(missing)} "
            "missing from the readings table",
            key="input.columns",
            fix="map all three vector columns in [input.columns], or none",
        )
    model = load_grid_model(ctx, out, missing="regional by FFT instead")
    height = grid_height(ctx, grid)
    if model is not None and height is None:
        out.warnings.append("grid height unknown: regional by FFT, not by the equivalent-source model")
        model = None
    methods = ["upward", "two_layer"] if cfg.method == "both" else [cfg.method]
    if "two_layer" in methods and height is None:
        height = 0.0
        out.warnings.append("grid height unknown: the two-layer fit assumes the grid at 0 m")
    results = {}
    if "upward" in methods:
        with translate(InputDataError, key="separate.regional_height_m"):
            regional, residual = sep.regional_upward(
                grid,
                cfg.regional_height_m,
                model=model,
                grid_height=height,
                pad_fraction=cfg.pad_fraction,
                pad_mode=cfg.pad_mode,
            )
        out.grids["regional_upward"], out.grids["residual_upward"] = regional, residual
        results["upward"] = regional
        out.metrics["upward_method"] = regional.attrs["separation_method"]
    if "two_layer" in methods:
        two, regional, residual = _two_layer(ctx, grid, height, out)
        out.grids["regional_two_layer"], out.grids["residual_two_layer"] = regional, residual
        results["two_layer"] = two
    for key in list(out.grids):
        vals = out.grids[key].values
        vals = vals[np.isfinite(vals)]
        out.metrics[f"{key}_rms"] = float(np.sqrt(np.mean(vals**2))) if vals.size else float("nan")

    column = _value_column(ctx, table) if table is not None else None
    if column is not None and all(c in table.columns for c in ("easting", "northing", "height")):
        e, n, u = (table[c].to_numpy(dtype=float) for c in ("easting", "northing", "height"))
        first = methods[0]
        if first == "upward" and model is not None:
            regional = model.predict((e, n, u + cfg.regional_height_m))
        elif first == "upward":  # continue the filled grid so readings in masked cells get a value
            from ..fields.harmonic.transforms import fill_masked

            full = fill_masked(grid) if np.isnan(grid.values).any() else grid
            with translate(InputDataError, key="separate.regional_height_m"):
                regional = sample_grid(
                    sep.regional_upward(
                        full, cfg.regional_height_m, pad_fraction=cfg.pad_fraction, pad_mode=cfg.pad_mode
                    )[0],
                    e,
                    n,
                )
        else:
            regional = results["two_layer"].predict_regional((e, n, u))
        out.table["regional"] = regional
        out.table["residual"] = table[column].to_numpy(dtype=float) - regional
        out.notes.append(f"regional/residual columns from the {first} method applied to '{column}'")
    else:
        out.notes.append("no value column or coordinates in the table: regional/residual columns not added")
    if len(present) == 3 and table is not None:
        _vector(ctx, table, grid, height if height is not None else 0.0, out)
    out.state = {
        "input_grid": name,
        "methods": methods,
        "regional_height_m": cfg.regional_height_m,
        "value_column": column,
        "grids": sorted(out.grids),
    }
    out.notes.append(f"regional/residual of '{name}' by {', '.join(methods)}")
    return out


def run(ctx: StageContext) -> StageOutput:
    """The separate stage: observatory networks on the sphere, survey grids on the plane."""
    if ctx.config.kind == "observatory":
        return run_observatory(ctx)
    return run_grids(ctx)


STAGE = Stage(
    name="separate",
    summary="separation of sources: regional/residual (upward continuation, two-layer "
    "equivalent sources), internal/external parts on the plane and on the sphere",
    run=run,
    sections=("separate", "grid"),
    contract=Contract(
        requires_columns={"observatory": ("time",)},
        reads={
            "observatory": (
                "time",
                "longitude",
                "latitude",
                "height",
                "station",
                "line",
                "disturbance_*",
                "mag_*",
                "igrf_*",
                "flag_*",
            ),
            # the value column (base.value_column) is one of the anomalies, levelled or not
            "*": (
                "easting",
                "northing",
                "height",
                *VECTOR,
                "flag_*",
                *(f"{c}*" for c in ANOMALY_COLUMN.values()),
            ),
        },
        optional_columns={
            "observatory": ("sep_internal_*", "sep_external_*", "sep_residual_*"),
            "*": ("regional", "residual", "internal_*", "external_*"),
        },
        provides_grids={"observatory": (), "*": ("regional_*", "residual_*", "internal_*", "external_*")},
        provides_tables={"observatory": ("coefficients", "station_residuals", "index_comparison"), "*": ()},
    ),
    inputs=lambda config, survey: (
        [survey.resolve(config.separate.index_file)] if config.separate.index_file else []
    ),
)
