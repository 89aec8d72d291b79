"""Diurnal correction speed, memory and accuracy: 1e4-1e6 readings against a 1 s base record;
IAGA-2002 read/write of a one-day 1 s file."""

from __future__ import annotations

import tempfile
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd
from _common import peak_rss_mb, timed

T0 = np.datetime64("2024-05-01T00:00:00", "ns")


def _external(t):
    return (
        25.0 * np.sin(2 * np.pi * t / 86400.0)
        + 3.0 * np.sin(2 * np.pi * t / 1800.0)
        + 0.8 * np.sin(2 * np.pi * t / 47.0)
    )


def _stamp(seconds):
    return T0 + np.round(np.asarray(seconds) * 1e9).astype("int64").astype("timedelta64[ns]")


def bench_diurnal_correction(sizes=(10_000, 100_000, 1_000_000)):
    from potfield.config import parse_config
    from potfield.fields.magnetic.diurnal import chord_deviation, clean_base, interpolate_base
    from potfield.stages.base import StageContext
    from potfield.stages.diurnal import STAGE
    from potfield.survey import Survey

    chord_deviation(np.arange(100.0), np.zeros(100), 15.0)  # compile outside the timings
    rows = []
    for n in sizes:
        rate = 10.0
        duration = n / rate
        tr = 300.0 + np.arange(n) / rate
        tb = np.arange(0.0, duration + 600.0)
        base = 48_000.0 + _external(tb)
        geology = 30.0 * np.sin(tr / 40.0)
        _, clean_s = timed(clean_base, tb, base)
        (_, _), linear_s = timed(interpolate_base, _stamp(tb), base, _stamp(tr), "linear")
        (_, _), cubic_s = timed(interpolate_base, _stamp(tb), base, _stamp(tr), "cubic")
        _, chord15_s = timed(chord_deviation, tb, base, 15.0)
        _, chord60_s = timed(chord_deviation, tb, base, 60.0)
        lines = 10
        table = pd.DataFrame(
            {
                "time": _stamp(tr),
                "longitude": 138.0 + 0.01 * (np.arange(n) * lines // n),
                "latitude": -33.0 + 0.05 * (np.arange(n) % (n // lines)) / (n // lines),
                "height": 100.0,
                "line": (1000 + 10 * (np.arange(n) * lines // n)).astype(str),
                "line_type": "traverse",
                "total_field": 50_000.0 + geology + _external(tr),
            }
        )
        with tempfile.TemporaryDirectory() as tmp:
            root = Path(tmp)
            (root / "raw").mkdir()
            pd.DataFrame(
                {"UTC": pd.Series(_stamp(tb)).dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), "MAG": base}
            ).to_csv(root / "raw" / "base.csv", index=False)
            config = parse_config(
                {
                    "survey": {"kind": "magnetic"},
                    "diurnal": {
                        "bases": [
                            {
                                "name": "B",
                                "file": "raw/base.csv",
                                "longitude": 138.0,
                                "latitude": -33.0,
                                "columns": {"time": "UTC", "total_field": "MAG"},
                            }
                        ]
                    },
                }
            )
            ctx = StageContext(config=config, survey=Survey(root), table=table)
            out, stage_s = timed(STAGE.run, ctx)
            tracemalloc.start()
            STAGE.run(ctx)
            _, peak = tracemalloc.get_traced_memory()
            tracemalloc.stop()
        corrected = out.table["total_field"] - out.table["diurnal"]
        error = (corrected - geology).to_numpy()
        rows.append(
            {
                "readings": n,
                "base_samples": int(tb.size),
                "clean_base_s": round(clean_s, 4),
                "interpolate_linear_s": round(linear_s, 4),
                "interpolate_cubic_s": round(cubic_s, 4),
                "chord_15s_s": round(chord15_s, 4),
                "chord_60s_s": round(chord60_s, 4),
                "stage_total_s": round(stage_s, 3),
                "stage_peak_traced_mb": round(peak / 2**20, 1),
                "peak_rss_mb": round(peak_rss_mb(), 1),
                "max_error_vs_analytic_nT": float(np.ptp(error)),
            }
        )
        print(rows[-1], flush=True)
    last = rows[-1]
    return {
        "runs": rows,
        "summary": f"{last['readings']:,} readings vs {last['base_samples']:,} s base: "
        f"stage {last['stage_total_s']} s, error {last['max_error_vs_analytic_nT']:.1e} nT",
    }


def bench_iaga2002_day():
    from potfield.io.iaga2002 import read_iaga2002, write_iaga2002

    t = np.arange(86_400.0)
    frame = pd.DataFrame(
        {
            "time": _stamp(t),
            "mag_north": 20_000 + _external(t),
            "mag_east": 1_500.0,
            "mag_down": 45_000 + 0.5 * _external(t),
            "total_field": 49_000 + _external(t),
        }
    )
    header = {
        "iaga_code": "BEN",
        "reported": "XYZF",
        "latitude": 40.0,
        "longitude": 255.0,
        "elevation": 1600.0,
    }
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "ben20240501vsec.sec"
        _, write_s = timed(write_iaga2002, path, frame, header)
        record, read_s = timed(read_iaga2002, path)
        size = path.stat().st_size
    error = float(np.max(np.abs(record.data["mag_north"].to_numpy() - frame["mag_north"].to_numpy())))
    result = {
        "records": int(t.size),
        "bytes": size,
        "write_s": round(write_s, 3),
        "read_s": round(read_s, 3),
        "max_round_trip_error_nT": error,
    }
    result["summary"] = f"86,400 records: write {result['write_s']} s, read {result['read_s']} s"
    return result
