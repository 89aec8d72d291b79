"""grid stage: harmonic gridding of the best value column with equivalent sources.

Glue only: picks the value column, block-reduces the usable readings, chooses source depth and
damping by blocked cross-validation, fits :func:`potfield.fields.harmonic.eqsources.fit_equivalent_sources`,
predicts a masked regular grid at constant height (or on a drape surface), adds the residual at
every reading, saves the fitted sources for later stages, and optionally micro-levels and grids
again. Methods: Dampney (1969) Geophysics 34:39; Cordell (1992) Geophysics 57:629; Soler and Uieda
(2021) GJI 227:1768; Takahashi, Oliveira and Barbosa (2020) Geophysics 85(6):G129.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..errors import ConfigError, StageError
from ..fields._numerics import nearest_neighbour_distances
from ..fields.harmonic import eqsources as eqs
from ..io.grids import make_grid
from .base import ANOMALY_COLUMN, Check, Contract, Stage, StageContext, StageOutput, usable, value_column
from .microlevel import micro_level_table

#: [grid] source_layer -> the depth_type of potfield.fields.harmonic.eqsources.
EQS_DEPTH_TYPE = {"follow_drape": "relative", "flat": "constant"}
#: Cross-validation table columns under potfield's own names (grid_cv.csv).
CV_COLUMNS = {"r2": "heldout_score", "r2_se": "heldout_score_se"}

#: Fewest block-reduced data for a blocked cross-validation; fewer use the middle of the search.
MIN_CV_DATA = 40


def _value_column(ctx: StageContext, table: pd.DataFrame) -> str:
    column = value_column(table, ctx.config.kind, ctx.state)
    if column is None:
        raise StageError(
            "the readings table has no anomaly column to grid",
            key="grid",
            fix="run the reference (and level) stages before the grid stage",
        )
    return column


#: Station surveys: the cell is this fraction of the station spacing (common practice: a
#: quarter to a half of the station spacing).
STATION_CELL_FRACTION = 0.5


def _station_spacing(table: pd.DataFrame, ok: np.ndarray):
    """Median nearest-neighbour distance (m) between the distinct positions of a station survey
    (a ``station`` column; repeat occupations count once), else None. The grid stage uses it
    for gravity station surveys, and for other kinds when the ingest found no line spacing or
    one below the station spacing (a line survey with station pegs keeps its lines)."""
    if "station" not in table.columns:
        return None
    positions = np.column_stack([table["easting"].to_numpy(float)[ok], table["northing"].to_numpy(float)[ok]])
    pts = np.unique(np.round(positions, 1), axis=0)
    distances = nearest_neighbour_distances(pts[:, 0], pts[:, 1])
    if distances.size == 0:
        return None
    spacing = float(np.median(distances))
    return spacing if spacing > 0 else None


def _cell_size(ctx: StageContext, table: pd.DataFrame, ok: np.ndarray, line_spacing, station_spacing=None):
    """Cell size (m) and how it was chosen."""
    cfg = ctx.config.grid
    if cfg.spacing_m > 0:
        return float(cfg.spacing_m), "[grid] spacing_m"
    if station_spacing:
        return STATION_CELL_FRACTION * station_spacing, (
            f"{STATION_CELL_FRACTION:g} x the median station spacing ({station_spacing:.0f} m, "
            "nearest neighbour)"
        )
    if line_spacing:
        # Common practice: a quarter to a fifth of the line spacing.
        return float(line_spacing) / 4.0, "a quarter of the line spacing"
    e = table["easting"].to_numpy(float)[ok]
    n = table["northing"].to_numpy(float)[ok]
    if ctx.config.kind == "gravity" or "distance" not in table.columns:
        return eqs.median_spacing(e, n), "median nearest-neighbour distance of the stations"
    dist = table["distance"].to_numpy(float)[ok]
    lines = table["line"].astype(str).to_numpy()[ok]
    step = np.abs(np.diff(dist))[lines[1:] == lines[:-1]]
    step = step[step > 0]
    return 5.0 * float(np.median(step)), "5 x the median along-line sample distance"


def _grid_height(ctx, heights):
    value = ctx.config.grid.height
    if value is None:
        return float(np.median(heights)), "median reading height"
    if isinstance(value, str):
        if value.strip().lower() == "drape":
            return "drape", "drape (the readings' heights)"
        try:
            return float(value), "[grid] height"
        except ValueError:
            raise ConfigError(
                f"grid height '{value}' is neither a number nor 'drape'",
                key="grid.height",
                fix="give a height in metres, 'drape', or remove the key",
            ) from None
    return float(value), "[grid] height"


def _drape_surface(e, n, h, grid_e, grid_n):
    """Heights of the readings interpolated on the grid (mean of the 10 nearest readings)."""
    from scipy.spatial import cKDTree

    tree = cKDTree(np.column_stack([e, n]))
    _, idx = tree.query(np.column_stack([grid_e.ravel(), grid_n.ravel()]), k=min(10, e.size))
    return h[idx].reshape(idx.shape[0], -1).mean(axis=1).reshape(grid_e.shape)


def _grid(
    model, region, spacing, height, data_e, data_n, data_h, mask_distance, name, units, long_name, history
):
    import verde as vd

    grid_e, grid_n = vd.grid_coordinates(region, spacing=spacing, adjust="region")
    if height == "drape":
        upward = _drape_surface(data_e, data_n, data_h, grid_e, grid_n)
    else:
        upward = np.full(grid_e.shape, float(height))
    keep = vd.distance_mask((data_e, data_n), maxdist=mask_distance, coordinates=(grid_e, grid_n))
    values = np.full(grid_e.shape, np.nan)
    if keep.any():
        values[keep] = model.predict((grid_e[keep], grid_n[keep], upward[keep]))
    grid = make_grid(
        grid_e[0], grid_n[:, 0], values, name=name, units=units, long_name=long_name, history=history
    )
    if height == "drape":
        grid = grid.assign_coords(upward=(("northing", "easting"), upward))
    else:
        grid.attrs["height"] = float(height)
    return grid


#: Largest number of blocks the depth/damping search runs on; bigger surveys search on a central
#: window of this many blocks (same data density, so the best relative depth carries over).
#: Measured on the magnetic demo: 3,000 and 5,000 blocks chose the same depth and damping as
#: 10,000 at 1e5 and 1e6 readings in less than half the time, but at 1e7 readings (tiled, 200 m
#: lines) 5,000 chose damping 1e-6 instead of 1e-5, and the grid was worse (RMS off the truth
#: 0.133 against 0.094 nT) and slower (431 against 331 s): kept at 10,000.
MAX_CV_BLOCKS = 10_000
#: The same when the fit is dense (up to DENSE_LIMIT blocks): every trial factors a matrix of
#: three quarters of the window (Cholesky, n^3 / 3 operations: 73 trials on 2,000 blocks took
#: 12 s, on 1,000 blocks they take ~1/8 of that). Measured on the 15k-reading demo: the same
#: depth and damping are chosen from 1,000 central blocks as from all 2,238.
MAX_CV_DENSE_BLOCKS = 1000


def _cv_window(e, n, h, d, limit: int = MAX_CV_BLOCKS):
    """The ``limit`` blocks nearest (in the max-norm) to the centre of the blocks."""
    if d.size <= limit:
        return e, n, h, d
    ce, cn = np.median(e), np.median(n)
    distance = np.maximum(np.abs(e - ce), np.abs(n - cn))
    keep = np.argpartition(distance, limit - 1)[:limit]
    return e[keep], n[keep], h[keep], d[keep]


def _fit_options(cfg, height, depth):
    """Keywords of the final fit: the layer type, the solver's stop and, under a grid of
    constant height, the layer's ceiling (:func:`potfield.fields.harmonic.eqsources.layer_ceiling`)."""
    return {
        "depth_type": EQS_DEPTH_TYPE[cfg.source_layer],
        "tol": float(cfg.tolerance),
        "ceiling": eqs.layer_ceiling(height, depth),
    }


def _fit(e, n, h, d, cfg, block, line_spacing, progress, height):
    """Block-reduce (block medians), cross-validate depth and damping, fit on all blocks."""
    (be, bn, bh), bd = eqs.block_median(e, n, h, d, block)
    scores, best = _search(be, bn, bh, bd, cfg, block, line_spacing, progress, height)
    progress(f"fitting sources (depth {best['depth']:.0f} m, damping {best['damping']:g})")
    model = eqs.fit_equivalent_sources(
        be,
        bn,
        bh,
        bd,
        depth=best["depth"],
        damping=best["damping"],
        block_size=block,
        method=cfg.method,
        **_fit_options(cfg, height, best["depth"]),
    )
    return model, scores, best, bd.size


def _cv_spacing(block, depths, line_spacing, extent):
    """Side (m) of the blocks held out together in the cross-validation.

    Line surveys: the line spacing, the distance the grid must bridge between lines (larger
    held-out blocks reward over-smooth, too deep layers: measured on the 1e6-reading demo with
    the earlier circulant-preconditioned solver, 1 km blocks chose 800 m deep sources, 3.0 % RMS
    off the true grid, 250 m blocks chose 225 m, 1.5 %).
    Scattered stations: 10 cells, but at least 3 x the largest depth. Always at most a quarter of
    the survey so every fold holds several blocks (common practice)."""
    if line_spacing:
        spacing = max(float(line_spacing), 2.0 * block)
    else:
        spacing = max(10.0 * block, 3.0 * max(depths))
    return min(spacing, extent / 4.0)


#: Stopping tolerance of the solver during the depth/damping search, looser than the final
#: fit's ([grid] tolerance, 2e-5) to keep the search cheap; all candidates are compared at the
#: same tolerance (at 1e-3 the smaller dampings were not reached and all scored alike).
CV_TOL = 1e-4


def _search(be, bn, bh, bd, cfg, block, line_spacing, progress, height):
    """Depth and damping by blocked CV (on a central window of large surveys), each depth
    scored with the ceiling its final fit gets under a grid at constant ``height``."""
    depths = [float(f) * block for f in cfg.trial_depths]
    dampings = [float(x) for x in cfg.trial_dampings]
    extent = max(be.max() - be.min(), bn.max() - bn.min(), block)
    if bd.size >= MIN_CV_DATA and (len(depths) > 1 or len(dampings) > 1):
        cv_spacing = _cv_spacing(block, depths, line_spacing, extent)
        progress(f"cross-validating {len(depths)} depths x {len(dampings)} dampings on {bd.size} blocks")
        region = (be.min(), be.max(), bn.min(), bn.max())
        dense = eqs.solver_method(cfg.method, bd.size, region, block) == "dense"
        ce, cn, ch, cd = _cv_window(be, bn, bh, bd, MAX_CV_DENSE_BLOCKS if dense else MAX_CV_BLOCKS)
        if cd.size < bd.size:
            progress(f"cross-validating on a central window of {cd.size} of {bd.size} blocks")
        scores, best = eqs.cross_validate(
            ce,
            cn,
            ch,
            cd,
            depths=depths,
            dampings=dampings,
            block_size=block,
            # the trials use the final fit's solver (a window of a large survey would else be
            # scored with dense sources and the whole survey fitted on the lattice)
            method="dense" if dense else "fft",
            folds=cfg.cv_folds,
            cv_spacing=cv_spacing,
            tol=CV_TOL,
            depth_type=EQS_DEPTH_TYPE[cfg.source_layer],
            grid_height=height,
        )
    else:
        scores = pd.DataFrame(columns=["depth", "damping", "r2", "r2_se", "rms", "chosen"])
        best = {
            "depth": depths[len(depths) // 2],
            "damping": dampings[len(dampings) // 2],
            "r2": float("nan"),
            "rms": float("nan"),
        }
    return scores, best


def run(ctx: StageContext) -> StageOutput:
    """Grid the value column; see the module docstring."""
    table = ctx.table
    if table is None or len(table) == 0:
        raise StageError("no readings to grid", key="grid", fix="run the ingest stage first")
    cfg = ctx.config.grid
    column = _value_column(ctx, table)
    for name in ("easting", "northing", "height"):
        if name not in table.columns:
            raise StageError(
                f"the readings table has no '{name}' column", key="grid", fix="run the ingest stage first"
            )
    values = table[column].to_numpy(float)
    e_all = table["easting"].to_numpy(float)
    n_all = table["northing"].to_numpy(float)
    h_all = table["height"].to_numpy(float)
    ok = usable(table) & np.isfinite(values) & np.isfinite(e_all) & np.isfinite(n_all) & np.isfinite(h_all)
    if ok.sum() < 10:
        raise StageError(
            f"only {int(ok.sum())} usable readings of '{column}' to grid",
            key="grid",
            fix="check the flags of the clean stage or add data",
        )
    ingest = ctx.state.get("ingest", {})
    line_spacing = ingest.get("line_spacing_m")
    line_spacing = float(line_spacing) if line_spacing and math.isfinite(line_spacing) else None
    station_spacing = _station_spacing(table, ok)
    if station_spacing and (
        ctx.config.kind == "gravity" or not line_spacing or line_spacing < station_spacing
    ):
        line_spacing = None  # scattered stations have no lines (ingest's value is spurious)
    else:  # stations pegged along real lines (line spacing above the station spacing)
        station_spacing = None
    spacing, spacing_why = _cell_size(ctx, table, ok, line_spacing, station_spacing)
    if not (spacing > 0 and math.isfinite(spacing)):
        raise StageError(
            "cannot derive a cell size from the data",
            key="grid.spacing_m",
            fix="set [grid] spacing_m to the cell size in metres",
        )
    block = float(cfg.block_m) if cfg.block_m > 0 else spacing
    e, n, h, d = e_all[ok], n_all[ok], h_all[ok], values[ok]
    height, height_why = _grid_height(ctx, h)
    if height != "drape" and height <= np.median(h) - 2.0 * min(cfg.trial_depths) * block:
        raise ConfigError(
            f"grid height {height} m is below the equivalent sources",
            key="grid.height",
            fix="grid at or above the readings' heights",
        )
    mask_distance = (
        cfg.mask_distance_m
        if cfg.mask_distance_m > 0
        else 2.0 * (line_spacing if line_spacing else (station_spacing or 4.0 * spacing))
    )
    gravity = column == "bouguer_anomaly" or ctx.config.kind == "gravity"
    name = ANOMALY_COLUMN["gravity" if gravity else "magnetic"]  # the main grid
    units = "mGal" if gravity else "nT"
    # the grid is named bouguer_anomaly for gravity, so its title names that quantity
    long_name = "Bouguer anomaly" if gravity else "total-field magnetic anomaly"
    region = (float(e.min()), float(e.max()), float(n.min()), float(n.max()))

    if cfg.tiled:
        return _run_tiled(
            ctx,
            table,
            column,
            values,
            ok,
            e,
            n,
            h,
            d,
            block,
            spacing,
            spacing_why,
            height,
            height_why,
            region,
            mask_distance,
            name,
            units,
            long_name,
            line_spacing,
        )
    out = StageOutput()
    model, scores, best, n_blocks = _fit(e, n, h, d, cfg, block, line_spacing, ctx.progress, height)
    history = (
        f"equivalent sources ({model.method}, source layer {cfg.source_layer}) of '{column}': "
        f"depth {best['depth']:.1f} m, damping {best['damping']:g}, blocks {block:g} m"
    )
    grid = _grid(model, region, spacing, height, e, n, h, mask_distance, name, units, long_name, history)

    result = table.copy(deep=False)
    micro_note = None
    if ctx.config.level.micro_levelling:
        if not line_spacing:
            micro_note = "micro-levelling skipped: no line spacing"
            out.degraded.append(
                "micro-levelling asked for ([level] micro_levelling) but the "
                "survey has no line spacing: not applied"
            )
        else:
            correction = np.asarray(
                micro_level_table(table, grid, line_spacing, ctx.config.level), dtype=float
            )
            result["micro_level_correction"] = correction
            result[f"{column}_micro"] = values + correction
            d = (values + correction)[ok]
            model, scores, best, n_blocks = _fit(e, n, h, d, cfg, block, line_spacing, ctx.progress, height)
            history += "; micro-levelled (Minty 1991) and gridded again"
            grid = _grid(
                model, region, spacing, height, e, n, h, mask_distance, name, units, long_name, history
            )
            values = values + correction
            column = f"{column}_micro"
            micro_note = "micro-levelled (Minty 1991) and gridded again"
    if micro_note:
        out.notes.append(micro_note)

    finite_pos = np.isfinite(e_all) & np.isfinite(n_all) & np.isfinite(h_all)
    predicted = np.full(len(table), np.nan)
    predicted[finite_pos] = model.predict((e_all[finite_pos], n_all[finite_pos], h_all[finite_pos]))
    result["grid_residual"] = values - predicted
    resid_rms = float(np.sqrt(np.nanmean(result["grid_residual"].to_numpy(float)[ok] ** 2)))
    flagged_rms = _flagged_rms(table, result["grid_residual"].to_numpy(float))

    model_path = ctx.survey.cache / "eqs_model.npz"
    eqs.save_model(model_path, model)

    out.table = result
    out.grids[name] = grid
    out.tables["grid_cv"] = scores.rename(columns=CV_COLUMNS)
    out.state = {
        "column": column,
        "value_column": column,
        "grid": name,
        "method": model.method,
        "source_layer": cfg.source_layer,
        "depth": float(best["depth"]),
        "damping": float(best["damping"]),
        "block_m": block,
        "spacing_m": spacing,
        "height": None if height == "drape" else float(height),
        "drape": height == "drape",
        "region": list(region),
        "mask_distance_m": float(mask_distance),
        "model_path": str(model_path),
        "units": units,
    }
    out.metrics = {
        "grid_method": model.method,
        "grid_cells": int(grid.size),
        "grid_blocks": int(n_blocks),
        "grid_sources": model.n_sources,
        "grid_spacing_m": spacing,
        "grid_depth_m": float(best["depth"]),
        "grid_damping": float(best["damping"]),
        "grid_heldout_score": float(best["r2"]),
        "grid_cv_rms": float(best["rms"]),
        "grid_residual_rms": resid_rms,
        **flagged_rms,
    }
    if model.info.get("iterations") is not None:
        out.metrics["grid_solver_iterations"] = int(model.info["iterations"])
    _residual_check(ctx, out, resid_rms, units)
    out.notes.append(
        f"grid: '{column}' on {spacing:g} m cells ({spacing_why}), height "
        f"{height if height == 'drape' else format(height, '.1f') + ' m'} "
        f"({height_why}), {model.method} equivalent sources, held-out "
        f"score {best['r2']:.4f}, residual RMS {resid_rms:.3g} {units}"
    )
    return out


def _residual_check(ctx: StageContext, out: StageOutput, rms: float, units: str) -> None:
    """Spec check of the grid residual RMS (reading minus model at every usable reading), when
    the profile sets ``grid_residual_rms_<units>``."""
    key = f"grid_residual_rms_{units}"
    if key in ctx.spec:
        tol, source = ctx.tolerance(key, 1.0)
        out.checks.append(
            Check.at_most(
                "grid residual RMS",
                rms,
                tol,
                units,
                source,
                detail="reading minus the gridding model at each usable reading",
            )
        )


#: Target number of blocks per tile when [grid] tile_size_m is 0 (a window this size fits in
#: well under a gigabyte with the FFT lattice solver).
TILE_BLOCKS = 40_000


def _run_tiled(
    ctx,
    table,
    column,
    values,
    ok,
    e,
    n,
    h,
    d,
    block,
    spacing,
    spacing_why,
    height,
    height_why,
    region,
    mask_distance,
    name,
    units,
    long_name,
    line_spacing,
) -> StageOutput:
    """Tiled gridding (potfield.fields.harmonic.tiles): the depth and damping come from the CV search on
    a central window, every tile is fitted on its own as a Dask task and the tiles are blended;
    the blended model is also evaluated at every reading for the grid residual. There is no
    single model, so none is saved for later stages."""
    import verde as vd

    from ..fields.harmonic.tiles import fit_tiled

    cfg = ctx.config.grid
    if height == "drape":
        raise ConfigError(
            "tiled gridding needs a constant grid height",
            key="grid.height",
            fix="set [grid] height to a number (m) or set tiled = false",
        )
    (be, bn, bh), bd = eqs.block_median(e, n, h, d, block)
    scores, best = _search(be, bn, bh, bd, cfg, block, line_spacing, ctx.progress, height)
    area = max((region[1] - region[0]) * (region[3] - region[2]), block**2)
    tile = (
        cfg.tile_size_m
        if cfg.tile_size_m > 0
        else max(20.0 * best["depth"], math.sqrt(area * TILE_BLOCKS / max(bd.size, 1)))
    )
    ctx.progress(f"tiled fit, tiles of {tile:.0f} m")
    # the same nodes as the whole-survey grid (verde adjust="region")
    ge, gn = vd.grid_coordinates(region, spacing=spacing, adjust="region")
    nodes = (float(ge.min()), float(ge.max()), float(gn.min()), float(gn.max()))
    e_all, n_all, h_all = (table[c].to_numpy(float) for c in ("easting", "northing", "height"))
    result = fit_tiled(
        be,
        bn,
        bh,
        bd,
        region=nodes,
        spacing=spacing,
        height=float(height),
        tile_size=tile,
        depth=best["depth"],
        damping=best["damping"],
        block_size=block,
        method=cfg.method,
        name=name,
        units=units,
        long_name=long_name,
        at=(e_all, n_all, h_all),
        fit_options=_fit_options(cfg, height, best["depth"]),
    )
    grid = result.grid
    ge, gn = np.meshgrid(grid.easting.values, grid.northing.values)
    keep = vd.distance_mask((e, n), maxdist=mask_distance, coordinates=(ge, gn))
    grid = grid.where(keep)
    grid.attrs.update(
        {
            "units": units,
            "long_name": long_name,
            "height": float(height),
            "history": f"tiled equivalent sources of '{column}': tiles {tile:.0f} m, "
            f"depth {best['depth']:.1f} m, damping {best['damping']:g}",
        }
    )
    out = StageOutput(table=table.copy(deep=False))
    out.table["grid_residual"] = values - result.predicted
    resid_rms = float(np.sqrt(np.nanmean(out.table["grid_residual"].to_numpy(float)[ok] ** 2)))
    flagged_rms = _flagged_rms(table, out.table["grid_residual"].to_numpy(float))
    out.grids[name] = grid
    out.tables["grid_cv"] = scores.rename(columns=CV_COLUMNS)
    out.tables["grid_tiles"] = result.tiles
    out.state = {
        "column": column,
        "value_column": column,
        "grid": name,
        "method": "tiled",
        "depth": float(best["depth"]),
        "damping": float(best["damping"]),
        "block_m": block,
        "spacing_m": spacing,
        "height": float(height),
        "drape": False,
        "region": list(region),
        "mask_distance_m": float(mask_distance),
        "model_path": None,
        "units": units,
        "tile_size_m": float(tile),
    }
    out.metrics = {
        "grid_method": "tiled",
        "grid_tiles": int(len(result.tiles)),
        "grid_tile_size_m": float(tile),
        "grid_cells": int(grid.size),
        "grid_blocks": int(bd.size),
        "grid_spacing_m": spacing,
        "grid_depth_m": float(best["depth"]),
        "grid_damping": float(best["damping"]),
        "grid_heldout_score": float(best["r2"]),
        "grid_cv_rms": float(best["rms"]),
        "grid_residual_rms": resid_rms,
        **flagged_rms,
    }
    _residual_check(ctx, out, resid_rms, units)
    out.notes.append(
        f"grid: '{column}' on {spacing:g} m cells ({spacing_why}), height "
        f"{float(height):.1f} m ({height_why}), {len(result.tiles)} tiles of "
        f"{tile:.0f} m blended, residual RMS {resid_rms:.3g} {units}"
    )
    return out


def _flagged_rms(table, residual) -> dict:
    """Grid misfit at the flagged readings (left out of the fit, but predicted too): the RMS of
    ``grid_residual`` over readings with any flag and over the spike-flagged ones, so a reviewer
    sees whether the flags removed noise (large misfit) or signal the grid now misses."""
    flagged = ~usable(table) & np.isfinite(residual)
    out = {
        "grid_residual_rms_flagged": float(np.sqrt(np.mean(residual[flagged] ** 2)))
        if flagged.any()
        else float("nan"),
        "grid_readings_flagged": int(flagged.sum()),
    }
    if "flag_spike" in table:
        spike = table["flag_spike"].to_numpy(bool) & np.isfinite(residual)
        out["grid_residual_rms_spikes"] = (
            float(np.sqrt(np.mean(residual[spike] ** 2))) if spike.any() else float("nan")
        )
    return out


STAGE = Stage(
    name="grid",
    summary="harmonic gridding with equivalent sources (blocked CV of depth and damping)",
    run=run,
    sections=("grid", "level"),
    inputs=None,
    kinds=("magnetic", "gravity"),
    contract=Contract(
        requires_columns={k: ("easting", "northing", "height", c) for k, c in ANOMALY_COLUMN.items()},
        provides_columns=("grid_residual",),
        optional_columns=("micro_level_correction", "*_micro"),
        # the value column (base.value_column) is one of the anomalies, levelled or not
        reads=(
            "easting",
            "northing",
            "height",
            "distance",
            "line",
            "line_type",
            "station",
            "flag_*",
            *(f"{c}*" for c in ANOMALY_COLUMN.values()),
        ),
        requires_state=("ingest",),
        provides_grids={k: (c,) for k, c in ANOMALY_COLUMN.items()},
        provides_tables=("grid_cv", "grid_tiles"),
    ),
)
