"""harmonica's gradient-boosted equivalent sources on the blocks the grid stage fitted: the one
comparison of potfield's gridding against harmonica on the demo (used by ``bench_pipeline.py``).

harmonica 0.7 ``EquivalentSourcesGB`` (Soler and Uieda 2021, GJI 227:1768) fits the sources
window by window (windows overlapping by half), each a dense damped least-squares fit of the
current residual, after which the window's sources are predicted at *every* datum to update the
residual. With ``m`` data per window and ``N`` data there are about ``4 N / m`` windows, so a
fit costs about ``4 N m^2`` (the dense solves, linear in ``N``) plus ``4 N^2`` kernel
evaluations (the residual updates, quadratic in ``N``): at 1e6 readings (~156,000 blocks) the
second term dominates and one fit takes minutes. Memory is one window's Jacobian, ``m^2``
floats, plus the solver's copy of it (verde.base.least_squares: column scaling, then
scikit-learn's Ridge).

Window size: harmonica's default, chosen so that about 5,000 data fall in each window
(``EquivalentSourcesGB`` docstring: "Defaults to estimating a window size such that approximately
5000 data points are in each window"; "We recommend using the larger windows that generate
Jacobian matrices that fit in the available memory"). A 5,000 x 5,000 Jacobian is 200 MB in
float64; doubling the window's data would make it 800 MB plus the solver's copy, past the 2 GB
memory goal, and multiply the dense solves' cost by eight. Surveys with at most 5,000 blocks are
fitted in one window (harmonica's own rule), i.e. ordinary equivalent sources.

Depth: the grid stage's chosen depth (``out/manifest.json``, grid state). harmonica places each
source at the depth below its block, as potfield's ``follow_drape`` layer does.

Damping: harmonica damps the Jacobian after scaling its columns to unit variance
(verde.base.least_squares, Ridge ``alpha``), potfield damps a kernel scaled to 1 beneath each
source, so the stage's damping is not the same number for harmonica. GB uses ``GB_DAMPING``
(env ``POTFIELD_BENCH_GB_DAMPING``), the best of 1e-5, 1e-4 and 1e-3 for it on held-out blocks of
the 1e6-reading demo (held-out R2 0.9999761, 0.9999779, 0.9999749 on one fold of
verde.BlockKFold of one line spacing; the former bench_grid_vs_harmonica_demo, commit 588dd16),
so GB is given a damping search that potfield's stage pays for inside its own time and GB does
not.
"""

from __future__ import annotations

import json
import os
import time
import warnings
from pathlib import Path

#: Damping of harmonica's Ridge solve in each window (see the module docstring).
GB_DAMPING = float(os.environ.get("POTFIELD_BENCH_GB_DAMPING", "1e-4"))
#: harmonica's default window (about 5,000 data per window).
GB_WINDOW = "default"
GB_SEED = 0


def stage_blocks(root: Path) -> dict:
    """The blocks the grid stage fitted, rebuilt from ``out/`` of a survey that ran.

    Block medians (:func:`potfield.fields.harmonic.eqsources.block_median`) of the usable
    readings (:func:`potfield.stages.base.usable`, finite value and position) of the value the
    stage gridded (grid state ``column``: the levelled anomaly, read by column from the cache
    files, :func:`potfield.io.tables.read_cache_columns`), at the stage's block size.

    Returns
    -------
    dict
        ``coords`` (easting, northing, height of the blocks), ``data``, and the stage's
        ``block_m``, ``depth``, ``damping``, ``height``, ``column``, ``drape``.
    """
    import numpy as np

    from potfield.fields.harmonic import eqsources as eqs
    from potfield.io.tables import manifest_layout, read_cache_columns
    from potfield.kinds import KIND_ORDER
    from potfield.stages.base import usable

    manifest = json.loads((root / "out" / "manifest.json").read_text())
    state = manifest["stages"]["grid"]["state"]
    column = state["column"]
    layout = manifest_layout(root / "out" / "cache", manifest["stages"], KIND_ORDER["magnetic"])
    flags = [c for c in layout if c.startswith("flag_")]
    table = read_cache_columns(layout, [column, "easting", "northing", "height", *flags])
    values = table[column].to_numpy(float)
    e, n, h = (table[c].to_numpy(float) for c in ("easting", "northing", "height"))
    ok = usable(table) & np.isfinite(values) & np.isfinite(e) & np.isfinite(n) & np.isfinite(h)
    block = float(state["block_m"])
    (be, bn, bh), bd = eqs.block_median(e[ok], n[ok], h[ok], values[ok], block)
    return {
        "coords": (be, bn, bh),
        "data": bd,
        "readings_usable": int(ok.sum()),
        "block_m": block,
        "depth": float(state["depth"]),
        "damping": float(state["damping"]),
        "height": state.get("height"),
        "drape": bool(state.get("drape")),
        "column": column,
        "source_layer": state.get("source_layer"),
    }


def gb_model(depth: float, damping: float = GB_DAMPING):
    """harmonica's gradient-boosted equivalent sources with the benchmark's settings."""
    import harmonica as hm

    return hm.EquivalentSourcesGB(damping=damping, depth=depth, window_size=GB_WINDOW, random_state=GB_SEED)


def warm_up(coords, data, depth: float) -> None:
    """Fit and predict on the first 3,000 blocks, so numba's compilation is not timed."""
    few = slice(0, 3000)
    model = gb_model(depth).fit(tuple(c[few] for c in coords), data[few])
    model.predict(tuple(c[:10] for c in coords))


def fit_and_grid(root: Path, grid_path: Path) -> tuple[dict, object]:
    """Fit GB on the stage's blocks and predict it on the stage's grid nodes.

    The nodes are those of ``grid_path`` (the stage's grid) that the stage kept (finite), at the
    stage's grid height (or the drape surface stored with the grid).

    Returns
    -------
    (dict, xarray.DataArray)
        Timings and settings, and GB's grid on the stage's coordinates (NaN where the stage's
        grid is NaN).
    """
    import numpy as np

    from potfield.io.grids import read_netcdf

    warnings.simplefilter("ignore")  # harmonica's one-window notice on small surveys
    blocks = stage_blocks(root)
    coords, data, depth = blocks["coords"], blocks["data"], blocks["depth"]
    warm_up(coords, data, depth)
    started = time.perf_counter()
    model = gb_model(depth).fit(coords, data)
    fit_s = time.perf_counter() - started
    grid = read_netcdf(grid_path)
    ge, gn = np.meshgrid(grid.easting.values, grid.northing.values)
    keep = np.isfinite(grid.values)
    if "upward" in grid.coords:
        up = np.asarray(grid.coords["upward"].values, dtype=float)[keep]
    else:
        up = np.full(int(keep.sum()), float(blocks["height"]))
    values = np.full(grid.shape, np.nan)
    started = time.perf_counter()
    values[keep] = model.predict((ge[keep], gn[keep], up))
    predict_s = time.perf_counter() - started
    info = {
        "blocks": int(data.size),
        "readings_usable": blocks["readings_usable"],
        "block_m": blocks["block_m"],
        "column": blocks["column"],
        "depth_m": depth,
        "stage_damping": blocks["damping"],
        "gb_damping": GB_DAMPING,
        "window_m": None if model.window_size_ is None else round(float(model.window_size_), 1),
        "windows": int(model.rmse_per_iteration_.size - 1),
        "grid_nodes_predicted": int(keep.sum()),
        "fit_s": round(fit_s, 3),
        "predict_s": round(predict_s, 3),
    }
    return info, grid.copy(data=values)
