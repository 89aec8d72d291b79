"""Benchmarks of line levelling (not tests): crossover search on a large synthetic survey.

``bench_crossovers()`` builds ``n_readings`` readings on ``n_lines`` lines (90 % east-west
traverse lines, 10 % north-south tie lines, gently curved tracks so every crossing is a true
segment intersection), finds the crossovers and reports time, peak memory (tracemalloc) and
accuracy: the count against the expected number (every traverse line crosses every tie once) and
the largest position error against the analytic crossing of the curved tracks.
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np

from potfield.fields.lines.leveling import adjust_lines, adjust_ties, find_crossovers, micro_level


def synthetic_tracks(n_readings=1_000_000, n_lines=200, spacing=100.0, seed=0):
    """Readings on curved traverse (E-W) and tie (N-S) lines and the analytic wiggle."""
    rng = np.random.default_rng(seed)
    n_ties = max(n_lines // 10, 1)
    n_trav = n_lines - n_ties
    width = n_trav * spacing  # traverse lines span the tie-line block and vice versa
    per_line = n_readings // n_lines
    s = np.linspace(0.0, 1.0, per_line)
    xs, ys, names, tie = [], [], [], []
    amp = 0.1 * spacing
    for k in range(n_trav):  # loop over lines (not readings)
        y0 = (k + 0.5) * spacing
        x = s * width
        xs.append(x if k % 2 == 0 else x[::-1])
        ys.append(y0 + amp * np.sin(2 * np.pi * xs[-1] / width * 3 + k))
        names += [f"L{k:04d}"] * per_line
        tie += [False] * per_line
    tie_spacing = width / n_ties
    for k in range(n_ties):
        x0 = (k + 0.5) * tie_spacing
        y = s * n_trav * spacing
        ys.append(y)
        xs.append(x0 + amp * np.sin(2 * np.pi * y / width * 2 + k))
        names += [f"T{k:03d}"] * per_line
        tie += [True] * per_line
    x = np.concatenate(xs)
    y = np.concatenate(ys)
    values = rng.normal(size=x.size)
    t = np.arange(x.size) * 0.1
    return x, y, np.array(names), np.array(tie), values, t, n_trav * n_ties


def _peak_mb(func):
    """Peak traced memory (MB) of one more call of ``func`` (tracemalloc slows it, so the
    timings come from an untraced call)."""
    tracemalloc.start()
    func()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20


def bench_crossovers(n_readings=1_000_000, n_lines=200):
    """Crossover search on ``n_readings`` readings over ``n_lines`` lines."""
    x, y, names, tie, values, t, expected = synthetic_tracks(n_readings, n_lines)
    t0 = time.perf_counter()
    cross = find_crossovers(x, y, names, tie, values, t, tie_tie=True)
    seconds = time.perf_counter() - t0
    peak = _peak_mb(lambda: find_crossovers(x, y, names, tie, values, t, tie_tie=True)) * 2**20
    trav = cross[cross["kind"] == "traverse-tie"]
    return {
        "readings": int(x.size),
        "lines": int(n_lines),
        "crossovers_found": int(len(trav)),
        "crossovers_expected": int(expected),
        "seconds": round(seconds, 3),
        "peak_memory_mb": round(peak / 2**20, 1),
        "accuracy": {"count_error": int(len(trav) - expected)},
    }


def bench_levelling(n_readings=1_000_000, n_lines=200, noise=0.05, offset_sd=5.0):
    """Crossovers + tie adjustment + robust constant per line, with injected per-line offsets.

    Accuracy: the largest error of a recovered line level relative to the datum (the mean tie
    offset), against the injected offsets (sd ``offset_sd``) with reading noise ``noise``.
    """
    x, y, names, tie, _, t, _ = synthetic_tracks(n_readings, n_lines)
    rng = np.random.default_rng(1)
    uniq, codes = np.unique(names, return_inverse=True)
    offsets = rng.normal(0.0, offset_sd, uniq.size)
    smooth = 50.0 * np.sin(x / 3000.0) * np.cos(y / 2000.0)
    values = smooth + offsets[codes] + rng.normal(0.0, noise, x.size)

    def level():
        cross = find_crossovers(x, y, names, tie, values, t, tie_tie=True)
        t1 = time.perf_counter()
        ties = adjust_ties(cross)
        lines = adjust_lines(cross, ties.corrections, model="constant")
        correction = lines.evaluate(names, t)
        correction[tie] = ties.corrections.reindex(names[tie]).to_numpy()
        return cross, correction, t1

    t0 = time.perf_counter()
    cross, correction, t1 = level()
    t2 = time.perf_counter()
    peak = _peak_mb(level) * 2**20
    is_tie_line = np.isin(uniq, names[tie])
    level = np.bincount(codes, weights=values + correction - smooth) / np.bincount(codes)
    datum = offsets[is_tie_line].mean()
    return {
        "readings": int(x.size),
        "lines": int(n_lines),
        "crossovers": int(len(cross)),
        "seconds_crossovers": round(t1 - t0, 3),
        "seconds_adjustment": round(t2 - t1, 3),
        "peak_memory_mb": round(peak / 2**20, 1),
        "accuracy": {
            "offset_sd": offset_sd,
            "noise": noise,
            "max_line_level_error": float(np.max(np.abs(level - datum))),
        },
    }


def bench_micro_level(n=1000, spacing=100.0, cell=25.0):
    """Micro-levelling of an ``n`` x ``n`` grid with alternating line-parallel stripes.

    Accuracy: RMS of the stripes before and after removing the estimated corrugation.
    """
    import xarray as xr

    coords = np.arange(n) * cell
    ee, nn = np.meshgrid(coords, coords)
    stripes = np.where(np.floor(nn / spacing) % 2 == 0, 1.0, -1.0)
    smooth = 200.0 * np.exp(-((ee - ee.mean()) ** 2 + (nn - nn.mean()) ** 2) / (2 * 2000.0**2))
    grid = xr.DataArray(
        smooth + stripes, coords={"northing": coords, "easting": coords}, dims=("northing", "easting")
    )
    t0 = time.perf_counter()
    corr = micro_level(grid, 90.0, spacing, 3.0, max_amplitude=2.0).to_numpy()
    seconds = time.perf_counter() - t0
    peak = _peak_mb(lambda: micro_level(grid, 90.0, spacing, 3.0, max_amplitude=2.0)) * 2**20
    core = (slice(n // 10, -n // 10), slice(n // 10, -n // 10))
    residual = (smooth + stripes - corr - smooth)[core]
    return {
        "grid": [n, n],
        "seconds": round(seconds, 3),
        "peak_memory_mb": round(peak / 2**20, 1),
        "accuracy": {
            "stripe_rms_before": float(np.sqrt(np.mean(stripes[core] ** 2))),
            "stripe_rms_after": float(np.sqrt(np.mean(residual**2))),
            "smooth_peak_to_peak_change": float(
                np.ptp((smooth + stripes - corr)[core]) / np.ptp(smooth[core]) - 1.0
            ),
        },
    }


if __name__ == "__main__":  # pragma: no cover
    import json

    print(
        json.dumps(
            {
                "crossovers": bench_crossovers(),
                "levelling": bench_levelling(),
                "micro_level": bench_micro_level(),
            },
            indent=2,
        )
    )
