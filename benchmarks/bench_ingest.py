"""Ingest + clean of synthetic line data at several sizes; CSV read with and without pyarrow."""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import pandas as pd
from _common import peak_rss_mb


def bench_ingest_clean(sizes=(10_000, 100_000, 1_000_000)):
    from potfield.cli import main
    from potfield.pipeline import run_survey
    from potfield.synthetic import write_synthetic_survey

    rows = []
    for n in sizes:
        with tempfile.TemporaryDirectory() as tmp:
            root = Path(tmp) / "s"
            main(["new", str(root), "--kind", "magnetic"])
            write_synthetic_survey(
                root, readings=n, seed=0, lines=max(10, n // 5000), ties=max(2, n // 50000)
            )
            started = time.perf_counter()
            summary = run_survey(root, until="clean", force=True)
            seconds = time.perf_counter() - started
            stages = {k: v.get("seconds") for k, v in summary.manifest["stages"].items()}
            csv = root / "raw" / "lines.csv"
            t0 = time.perf_counter()
            pd.read_csv(csv)
            c_engine = time.perf_counter() - t0
            t0 = time.perf_counter()
            pd.read_csv(csv, engine="pyarrow")
            arrow_engine = time.perf_counter() - t0
        rows.append(
            {
                "readings": n,
                "seconds_ingest_clean_total": round(seconds, 3),
                "stages": stages,
                "peak_rss_mb": round(peak_rss_mb(), 1),
                "read_csv_c_s": round(c_engine, 3),
                "read_csv_pyarrow_s": round(arrow_engine, 3),
            }
        )
        print(rows[-1], flush=True)
    last = rows[-1]
    return {
        "runs": rows,
        "summary": f"{last['readings']:,} readings: ingest+clean+outputs {last['seconds_ingest_clean_total']} s, "
        f"peak RSS {last['peak_rss_mb']} MB",
    }
