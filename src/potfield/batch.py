"""Batches of surveys on Dask: one survey per task, failures reported without stopping the others.

By default a ``dask.distributed.LocalCluster`` with ``workers`` single-threaded worker processes
is started (no dashboard); ``scheduler`` connects to an existing cluster instead, whose workers
must have potfield installed and see the survey folders at the same paths.
"""

from __future__ import annotations

import time
import traceback
from pathlib import Path

from .errors import PotfieldError


def run_one(directory: str, force: bool = False) -> dict:
    """Run one survey; never raises (the result says what happened)."""
    from .pipeline import run_survey

    started = time.perf_counter()
    row = {
        "survey": directory,
        "status": "ok",
        "seconds": 0.0,
        "readings": None,
        "checks": 0,
        "failed_checks": 0,
        "message": "",
    }
    try:
        summary = run_survey(directory, force=force)
        ingest = summary.manifest.get("stages", {}).get("ingest", {}).get("metrics", {})
        row.update(
            readings=ingest.get("readings"),
            checks=len(summary.checks),
            failed_checks=len(summary.failed_checks),
        )
    except PotfieldError as err:
        row.update(status="error", message=str(err))
    except Exception as err:  # a bug in one survey must not stop the batch
        row.update(
            status="crash",
            message=f"{type(err).__name__}: {err} | " + traceback.format_exc().strip().splitlines()[-1],
        )
    row["seconds"] = round(time.perf_counter() - started, 2)
    return row


def run_batch_rows(
    directories: list[Path], workers: int = 2, scheduler: str | None = None, force: bool = False
) -> list[dict]:
    """Process every survey folder as one Dask task; returns one result row per survey."""
    from dask.distributed import Client, LocalCluster

    cluster = None
    if scheduler is None:
        cluster = LocalCluster(
            n_workers=max(int(workers), 1), threads_per_worker=1, processes=True, dashboard_address=None
        )
        client = Client(cluster)
    else:
        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError) as err:
            raise PotfieldError(
                f"cannot reach the Dask scheduler at {scheduler} ({err})",
                fix="check the address (tcp://host:8786) or omit --scheduler",
            ) from None
    try:
        futures = client.map(run_one, [str(Path(d).resolve()) for d in directories], force=force, pure=False)
        rows = client.gather(futures)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return rows


def run_batch(
    directories: list[Path], workers: int = 2, scheduler: str | None = None, force: bool = False
) -> list[dict]:
    """Run the batch and print the summary table; returns the rows that failed."""
    from rich.console import Console
    from rich.table import Table

    rows = run_batch_rows(directories, workers, scheduler, force)
    table = Table(title=f"potfield batch: {len(rows)} surveys")
    for column in ("survey", "status", "readings", "seconds", "checks", "failed checks", "message"):
        table.add_column(column)
    for row in rows:
        table.add_row(
            row["survey"],
            row["status"],
            "" if row["readings"] is None else f"{row['readings']:,}",
            f"{row['seconds']:.1f}",
            str(row["checks"]),
            str(row["failed_checks"]),
            row["message"][:120],
        )
    Console().print(table)
    return [r for r in rows if r["status"] != "ok"]
