"""Demo generators: time and peak memory of the magnetic scenario at several sizes (the 1,000,000
reading target is under two minutes), the gravity and observatory scenarios, and the accuracy of
the generators' own physics against reference libraries (harmonica, chaosmagpy).

Each size runs in a fresh Python process so its peak resident memory (ru_maxrss) is its own.
Set POTFIELD_BENCH_DEMO_SIZES="10000,100000,1000000,10000000" to change the sizes.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile

_CHILD = r"""
import json, resource, sys, time
from pathlib import Path
import numpy as np, pandas as pd
from potfield.demo import make_demo
kind, folder, n = sys.argv[1], Path(sys.argv[2]), sys.argv[3]
n = None if n == "none" else int(n)
# warm up numba/harmonica compilation outside the timing
make_demo(kind, folder / "warm", readings=10_000 if kind == "magnetic" else None, seed=1)
t0 = time.perf_counter()
make_demo(kind, folder / "run", readings=n, seed=0)
seconds = time.perf_counter() - t0
out = {"seconds": round(seconds, 2), "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)}
run = folder / "run"
out["bytes"] = {str(p.relative_to(run)): p.stat().st_size for p in sorted(run.rglob("*")) if p.is_file()}
if kind == "magnetic":
    raw = pd.read_csv(run / "raw" / "mag_lines.csv", usecols=["total_field_nT"])
    truth = pd.read_csv(run / "truth" / "readings_truth.csv")
    total = truth[["igrf_total", "crustal_anomaly", "external", "level_error", "noise", "spike"]].sum(axis=1)
    out["readings"] = int(len(raw))
    out["readings_per_s"] = round(len(raw) / seconds)
    out["max_abs_tmi_minus_sum_of_truth_nT"] = float(np.max(np.abs(total - raw["total_field_nT"])))
print(json.dumps(out))
"""


def _run(kind: str, n) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        proc = subprocess.run(
            [sys.executable, "-c", _CHILD, kind, tmp, str(n)], capture_output=True, text=True, timeout=3600
        )
    if proc.returncode != 0:
        return {"error": proc.stderr[-2000:]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def bench_demo_magnetic():
    sizes = [int(s) for s in os.environ.get("POTFIELD_BENCH_DEMO_SIZES", "10000,100000,1000000").split(",")]
    rows = []
    for n in sizes:
        row = {"requested_readings": n, **_run("magnetic", n)}
        rows.append(row)
    million = [r for r in rows if r["requested_readings"] == 1_000_000 and "seconds" in r]
    summary = ", ".join(
        f"{r.get('readings', r['requested_readings']):,}: {r.get('seconds', 'error')} s" for r in rows
    )
    if million:
        summary += f" (1M target < 120 s: {'met' if million[0]['seconds'] < 120 else 'MISSED'})"
    return {"sizes": rows, "summary": summary}


def bench_demo_gravity_observatory():
    out = {kind: _run(kind, "none") for kind in ("gravity", "observatory")}
    out["summary"] = ", ".join(
        f"{k}: {v.get('seconds', 'error')} s, {v.get('peak_rss_mb', '?')} MB" for k, v in out.items()
    )
    return out


def bench_demo_physics_accuracy():
    """Generators' kernels against reference libraries."""
    import time

    import chaosmagpy.model_utils as cpm
    import harmonica as hm
    import numpy as np

    from potfield.demo import gravity, observatory

    rng = np.random.default_rng(0)
    # observatory synthesis vs chaosmagpy, degree 6, 100,000 points
    n = 100_000
    coeffs = rng.normal(0, 30, (n, 48))
    r = 6371.2 + rng.uniform(0, 700, n)
    th = rng.uniform(1, 179, n)
    ph = rng.uniform(-180, 180, n)
    errs = {}
    for source in ("internal", "external"):
        t0 = time.perf_counter()
        ours = observatory.synth_field(coeffs, r, th, ph, source=source)
        t_ours = time.perf_counter() - t0
        ref = cpm.synth_values(coeffs, r, th, ph, source=source)
        errs[source] = {
            "max_abs_nT": float(max(np.max(np.abs(a - b)) for a, b in zip(ours, ref))),
            "seconds_100k_points_degree6": round(t_ours, 3),
        }
    # gravity topography kernel (prism < 3 km, line mass beyond) vs harmonica prisms, flat Earth
    cells = np.arange(-9875.0, 10000.0, 250.0)
    E, N = np.meshgrid(cells, cells)
    dem = 250.0 + 80.0 * np.sin(E / 1700.0) * np.cos(N / 2300.0)
    x, y = rng.uniform(-3000, 3000, 50), rng.uniform(-3000, 3000, 50)
    col = np.floor((x + 10000) / 250).astype(int)
    row = np.floor((y + 10000) / 250).astype(int)
    z = dem[row, col] + 1.0
    saved = gravity.EARTH_RADIUS, gravity.FAR_RADIUS
    try:
        gravity.EARTH_RADIUS, gravity.FAR_RADIUS = 1e15, 30_000.0
        t0 = time.perf_counter()
        mine = gravity.topography_gravity(x, y, z, cells, cells, dem, 0.0)
        t_mine = time.perf_counter() - t0
    finally:
        gravity.EARTH_RADIUS, gravity.FAR_RADIUS = saved
    prisms = np.column_stack(
        [E.ravel() - 125, E.ravel() + 125, N.ravel() - 125, N.ravel() + 125, np.zeros(E.size), dem.ravel()]
    )
    t0 = time.perf_counter()
    ref = hm.prism_gravity((x, y, z), prisms, np.full(E.size, 2670.0), field="g_z")
    t_ref = time.perf_counter() - t0
    return {
        "observatory_vs_chaosmagpy": errs,
        "topography_vs_harmonica": {
            "stations": 50,
            "prisms": int(E.size),
            "max_abs_mGal": float(np.max(np.abs(mine - ref))),
            "seconds_ours": round(t_mine, 3),
            "seconds_harmonica": round(t_ref, 3),
        },
        "summary": (
            f"SH synthesis vs chaosmagpy {max(e['max_abs_nT'] for e in errs.values()):.1e} nT; "
            f"terrain kernel vs harmonica {float(np.max(np.abs(mine - ref))):.1e} mGal"
        ),
    }


if __name__ == "__main__":  # pragma: no cover
    print(json.dumps({"magnetic": bench_demo_magnetic()}, indent=1))
