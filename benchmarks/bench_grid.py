"""Benchmark: equivalent-source gridding of airborne-like line data.

potfield's lattice (FFT + conjugate gradients) equivalent sources against harmonica 0.7
EquivalentSourcesGB (default windows; Soler and Uieda 2021, GJI 227:1768) and verde.Spline (only
where it finishes), all fitted to the same block-reduced data. For each size: seconds to fit,
peak traced memory, R^2 on held-out blocks (one fold of verde.BlockKFold, 500 m blocks) and
relative RMS against the true field (harmonica point masses) on the grid at the flight height,
within 1.5 line spacings of the training data.

Run ``python benchmarks/bench_grid.py 1e4 1e5`` or through ``make bench``.
"""

from __future__ import annotations

import json
import sys
import time
import tracemalloc
import warnings

import numpy as np

LINE_SPACING = 200.0  # m
SAMPLE = 10.0  # m along line
BLOCK = 50.0  # m: a quarter of the line spacing (common practice)
HEIGHT = 150.0  # m
DEPTH = 4.5 * BLOCK  # 4.5 block spacings, within Dampney's (1969) 2.5-6 data spacings
DAMPING = 1e-2


def _survey(size, seed=0):
    import harmonica as hm

    rng = np.random.default_rng(seed)
    side = np.sqrt(size * SAMPLE * LINE_SPACING)
    east, north = np.meshgrid(np.arange(0.0, side, SAMPLE), np.arange(0.0, side, LINE_SPACING))
    east = east + rng.normal(0, 3, east.shape)
    north = north + rng.normal(0, 8, north.shape)
    up = HEIGHT + rng.normal(0, 10, east.shape)
    count = max(20, int(side * side / 4e6 * 3))  # ~3 sources per 2 km x 2 km
    sources = (rng.uniform(0, side, count), rng.uniform(0, side, count), -rng.uniform(300, 1500, count))
    masses = rng.normal(0, 1e11, count)

    def truth(coordinates):
        return hm.point_gravity(coordinates, sources, masses, field="g_z")

    coords = (east.ravel(), north.ravel(), up.ravel())
    return coords, truth(coords), truth, side


def _measure(function):
    tracemalloc.start()
    start = time.perf_counter()
    result = function()
    seconds = time.perf_counter() - start
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return result, seconds, peak / 2**20


def _r2(obs, pred):
    return float(1.0 - np.sum((obs - pred) ** 2) / np.sum((obs - obs.mean()) ** 2))


def bench_grid(sizes=(1e4, 1e5, 1e6), gb_max=1e5, spline_max=1e4, seed=0):
    """Gridding speed, memory and accuracy at several survey sizes (raw readings).

    Parameters
    ----------
    sizes : sequence of float
        Numbers of raw readings (before the block reduction).
    gb_max, spline_max : float
        Largest raw size at which harmonica EquivalentSourcesGB / verde.Spline are run (GB takes
        about 6 minutes at 1e6 readings on 2 cores; the dense spline grows as N^3).
    """
    import harmonica as hm
    import verde as vd

    from potfield.fields.harmonic import eqsources as eqs

    warnings.simplefilter("ignore")
    results = []
    for size in sizes:
        size = int(size)
        coords, data, truth, side = _survey(size, seed)
        (blocked, bdata), t_block, _ = _measure(
            lambda: vd.BlockReduce(np.median, spacing=BLOCK, drop_coords=False).filter(coords, data)
        )
        blocked = tuple(np.asarray(c, dtype=float).ravel() for c in blocked)
        bdata = np.asarray(bdata, dtype=float).ravel()
        kfold = vd.BlockKFold(spacing=2.5 * LINE_SPACING, n_splits=5, shuffle=True, random_state=seed)
        train, test = next(kfold.split(np.column_stack(blocked[:2])))
        grid = vd.grid_coordinates(
            (0.1 * side, 0.9 * side, 0.1 * side, 0.9 * side), spacing=BLOCK * 4, extra_coords=HEIGHT
        )
        true_grid = truth(grid)
        near = vd.distance_mask(
            tuple(c[train] for c in blocked[:2]), maxdist=1.5 * LINE_SPACING, coordinates=grid[:2]
        )
        entry = {
            "readings": size,
            "blocks": int(bdata.size),
            "train": int(train.size),
            "block_reduce_s": round(t_block, 2),
            "methods": {},
        }

        def record(name, fit):
            model, seconds, peak = _measure(fit)
            pred = model.predict(tuple(c[test] for c in blocked))
            grid_pred = model.predict(grid)
            entry["methods"][name] = {
                "fit_s": round(seconds, 2),
                "peak_mb": round(peak, 1),
                "cv_r2": round(_r2(bdata[test], pred), 6),
                "grid_rel_rms": round(
                    float(np.sqrt(np.mean((grid_pred - true_grid)[near] ** 2)) / np.std(true_grid[near])), 5
                ),
            }
            if hasattr(model, "info"):
                entry["methods"][name]["info"] = {
                    k: v for k, v in model.info.items() if isinstance(v, (int, float, bool))
                }
            print(json.dumps({size: {name: entry["methods"][name]}}), file=sys.stderr, flush=True)

        tc = tuple(c[train] for c in blocked)
        record(
            "potfield_lattice",
            lambda: eqs.fit_equivalent_sources(
                *tc, bdata[train], depth=DEPTH, damping=DAMPING, block_size=BLOCK, method="fft"
            ),
        )
        if size <= gb_max:
            record(
                "harmonica_gb",
                lambda: hm.EquivalentSourcesGB(damping=DAMPING, depth=DEPTH, random_state=seed).fit(
                    tc, bdata[train]
                ),
            )
        if size <= spline_max:
            record("verde_spline", lambda: vd.Spline(damping=1e-5).fit(tc[:2], bdata[train]))
        results.append(entry)
    return {
        "benchmark": "grid",
        "line_spacing_m": LINE_SPACING,
        "block_m": BLOCK,
        "depth_m": DEPTH,
        "damping": DAMPING,
        "results": results,
    }


if __name__ == "__main__":
    chosen = tuple(float(a) for a in sys.argv[1:]) or (1e4, 1e5)
    print(json.dumps(bench_grid(chosen, gb_max=max(chosen)), indent=2))
