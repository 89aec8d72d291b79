"""IGRF-14 synthesis: potfield.fields.magnetic.igrf against ppigrf (speed, peak memory, accuracy).

Points are uniform on the sphere, heights 0-20 km, one decimal-year date per point (2020-2025).
ppigrf takes one date per call, so it is timed with a single date (handed over as the datetime
at the same fraction of the epoch interval, see tests/reference/test_igrf_ppigrf.py); it needs
~10 KB per point, so it runs in chunks, and above ``ppigrf_max`` points its time is scaled
linearly from the largest size it ran (said in the result).
"""

from __future__ import annotations

import datetime as dt
import time
import tracemalloc
import warnings

import numpy as np

PPIGRF_CHUNK = 50_000


def _points(n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    lon = rng.uniform(-180.0, 180.0, n)
    lat = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    height = rng.uniform(0.0, 20_000.0, n)
    year = rng.uniform(2020.0, 2025.0, n)
    return lon, lat, height, year


def _best(func, repeat: int) -> float:
    best = np.inf
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        best = min(best, time.perf_counter() - start)
    return best


def _peak_bytes(func) -> int:
    tracemalloc.start()
    try:
        func()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def _ppigrf_date(year: float) -> dt.datetime:
    k = min(int((year - 1900.0) // 5), 25)
    frac = (year - 1900.0) / 5.0 - k
    start, end = dt.datetime(1900 + 5 * k, 1, 1), dt.datetime(1905 + 5 * k, 1, 1)
    return start + (end - start) * frac


def _ppigrf_run(lon, lat, height, year):
    import ppigrf

    out = np.empty((3, lon.size))
    when = _ppigrf_date(year)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for start in range(0, lon.size, PPIGRF_CHUNK):
            sl = slice(start, start + PPIGRF_CHUNK)
            be, bn, bu = ppigrf.igrf(lon[sl], lat[sl], height[sl] / 1000.0, when)
            out[:, sl] = bn[0], be[0], -bu[0]
    return out


def bench_igrf(sizes=(10_000, 100_000, 1_000_000), ppigrf_max: int = 100_000, repeat: int = 3):
    """Time potfield's IGRF and ppigrf side by side.

    Returns a dict with, per size: seconds and points/s of ours (per-point dates, best of
    ``repeat``), ppigrf seconds (measured or scaled), the speed-up, peak traced memory of both,
    and the largest absolute difference (nT) of X, Y, Z, F where ppigrf ran.
    """
    from potfield.fields.magnetic.igrf import igrf

    igrf(0.0, 0.0, 0.0, 2020.0)  # compile (or load the cached kernel) before timing
    rows = []
    ppigrf_rate = None  # seconds per point of the largest ppigrf run
    for n in sizes:
        lon, lat, height, year = _points(n)
        ours_s = _best(lambda: igrf(lon, lat, height, year), repeat)
        ours_peak = _peak_bytes(lambda: igrf(lon, lat, height, year))
        times = np.datetime64("2020-01-01", "ns") + ((year - 2020.0) * 365.25 * 86400e9).astype(
            "timedelta64[ns]"
        )
        ours_dt_s = _best(lambda: igrf(lon, lat, height, times), repeat)
        row = {
            "points": n,
            "ours_seconds": round(ours_s, 4),
            "ours_points_per_second": round(n / ours_s),
            "ours_seconds_datetime64_input": round(ours_dt_s, 4),
            "ours_peak_memory_mb": round(ours_peak / 2**20, 1),
        }
        single = 2022.37
        if n <= ppigrf_max:
            start = time.perf_counter()
            ref = _ppigrf_run(lon, lat, height, single)
            pp_s = time.perf_counter() - start
            ppigrf_rate = pp_s / n
            pp_peak = _peak_bytes(lambda: _ppigrf_run(lon[:10_000], lat[:10_000], height[:10_000], single))
            same = igrf(lon, lat, height, single)
            diff = max(
                float(np.max(np.abs(same.north - ref[0]))),
                float(np.max(np.abs(same.east - ref[1]))),
                float(np.max(np.abs(same.down - ref[2]))),
                float(np.max(np.abs(same.total - np.sqrt((ref**2).sum(axis=0))))),
            )
            row.update(
                {
                    "ppigrf_seconds": round(pp_s, 3),
                    "ppigrf_measured": True,
                    "ppigrf_peak_memory_mb_per_10k_points": round(pp_peak / 2**20, 1),
                    "max_abs_difference_nT": diff,
                }
            )
        else:
            pp_s = ppigrf_rate * n if ppigrf_rate else float("nan")
            row.update(
                {
                    "ppigrf_seconds": round(pp_s, 3),
                    "ppigrf_measured": False,
                    "ppigrf_note": f"scaled linearly from its {ppigrf_max}-point run",
                }
            )
        row["speedup"] = round(pp_s / ours_s, 1)
        rows.append(row)
    top = rows[-1]
    return {
        "sizes": list(sizes),
        "rows": rows,
        "summary": (
            f"{top['points']} points: {top['ours_seconds']} s "
            f"({top['ours_points_per_second'] / 1e6:.2f} M points/s), "
            f"{top['speedup']}x ppigrf"
            f"{'' if top.get('ppigrf_measured') else ' (ppigrf time scaled)'}"
        ),
    }


if __name__ == "__main__":  # pragma: no cover
    import json

    print(json.dumps(bench_igrf(), indent=1))
