"""`make bench`: run every bench_*() function of benchmarks/bench_*.py and write JSON results.

Usage: python benchmarks/run.py [TOPIC | TOPIC.FUNCTION ...]
       (e.g. `ingest igrf` or `pipeline.bench_pipeline`; default: all)
Results: benchmarks/results/<topic>.json and benchmarks/results/summary.md.
"""

from __future__ import annotations

import importlib.util
import json
import platform
import sys
import time
import traceback
from datetime import UTC, datetime
from pathlib import Path

HERE = Path(__file__).parent
RESULTS = HERE / "results"


def write_summary() -> None:
    """summary.md from every result file (so a run of one topic keeps the others' rows)."""
    rows = ["| benchmark | status | date | result |", "|---|---|---|---|"]
    for path in sorted(RESULTS.glob("*.json")):
        try:
            record = json.loads(path.read_text())
        except (OSError, json.JSONDecodeError):
            continue
        if "benchmark" not in record:
            continue
        result = record.get("result", {})
        brief = result.get("summary", "") if isinstance(result, dict) else ""
        rows.append(
            f"| {record['benchmark']} | {record.get('status', '')} | {record.get('date', '')} | {brief} |"
        )
    (RESULTS / "summary.md").write_text("\n".join(rows) + "\n")


def main(argv: list[str]) -> int:
    RESULTS.mkdir(exist_ok=True)
    wanted = set(argv)
    files = sorted(HERE.glob("bench_*.py"))
    failures = 0
    for path in files:
        topic = path.stem.removeprefix("bench_")
        functions = {w.split(".", 1)[1] for w in wanted if w.startswith(topic + ".")}
        if wanted and topic not in wanted and not functions:
            continue
        spec = importlib.util.spec_from_file_location(path.stem, path)
        module = importlib.util.module_from_spec(spec)
        sys.path.insert(0, str(HERE))
        spec.loader.exec_module(module)
        for name in sorted(n for n in dir(module) if n.startswith("bench_")):
            if functions and topic not in wanted and name not in functions:
                continue
            print(f"== {topic}.{name}", flush=True)
            started = time.perf_counter()
            try:
                result = getattr(module, name)()
                status = "ok"
            except Exception:  # a benchmark failure must not hide the others
                result = {"error": traceback.format_exc()}
                status = "error"
                failures += 1
            record = {
                "benchmark": f"{topic}.{name}",
                "status": status,
                "seconds_total": round(time.perf_counter() - started, 3),
                "machine": {
                    "python": platform.python_version(),
                    "processor": platform.machine(),
                    "cpus": __import__("os").cpu_count(),
                },
                "date": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
                "result": result,
            }
            out = RESULTS / f"{topic}.{name}.json"
            out.write_text(json.dumps(record, indent=2, default=str) + "\n")
            print(json.dumps(record["result"], indent=1, default=str)[:3000], flush=True)
    write_summary()
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
