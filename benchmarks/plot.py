"""Figures and tables of benchmark results: a log-log plot of time against size and a markdown
table writer.

Usage: python benchmarks/plot.py [results/pipeline.bench_pipeline.json]
(re-draws results/pipeline.md and results/pipeline.png from a saved pipeline benchmark).
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"

#: Pipeline stages in run order (magnetic surveys), for column order and colours.
#: Marker per series (with line styles, so series stay apart where colours are close).
MARKERS = ("o", "s", "^", "v", "D", "P", "X", "*", "h", "<", ">", "p")
STAGE_ORDER = ("ingest", "clean", "diurnal", "reference", "level", "grid", "separate", "derive", "report")


def markdown_table(header: list[str], rows: list[list]) -> str:
    """A GitHub-flavoured markdown table; floats get 3 significant digits, None shows '-'."""

    def cell(value):
        if value is None or (isinstance(value, float) and math.isnan(value)):
            return "-"
        if isinstance(value, float):
            if value == 0:
                return "0"
            digits = max(0, 2 - int(math.floor(math.log10(abs(value)))))
            return f"{value:,.{digits}f}"
        if isinstance(value, int):
            return f"{value:,}"
        return str(value).replace("|", "\\|")

    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(cell(v) for v in row) + " |" for row in rows]
    return "\n".join(lines)


def loglog_plot(
    path: Path,
    series: dict[str, tuple[list, list]],
    *,
    xlabel: str,
    ylabel: str,
    title: str,
    reference_slope: float | None = 1.0,
    styles: dict | None = None,
) -> Path:
    """Log-log line plot of several (x, y) series, with an optional slope guide; PNG, atomic."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from potfield.io.atomic import atomic_path

    styles = styles or {}
    fig, ax = plt.subplots(figsize=(9.5, 5.5), dpi=120)
    cmap = plt.get_cmap("viridis")
    names = list(series)
    xs_all, ys_all = [], []
    for k, name in enumerate(names):
        x, y = series[name]
        pts = [(a, b) for a, b in zip(x, y) if a and b and b > 0]
        if not pts:
            continue
        x, y = zip(*pts)
        xs_all += list(x)
        ys_all += list(y)
        style = {
            "marker": MARKERS[k % len(MARKERS)],
            "ls": ("-", "--", "-.")[k % 3],
            "color": cmap(k / max(len(names) - 1, 1)),
            "lw": 1.2,
        }
        style.update(styles.get(name, {}))
        ax.plot(x, y, label=name, **style)
    if reference_slope and xs_all:
        x0, x1 = min(xs_all), max(xs_all)
        y0 = max(ys_all)
        ax.plot(
            [x0, x1],
            [y0 * (x0 / x1) ** reference_slope, y0],
            color="0.5",
            ls=":",
            lw=1,
            label=f"slope {reference_slope:g} guide",
        )
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)
    fig.tight_layout()
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png")
    plt.close(fig)
    return Path(path)


def _stages_seen(runs) -> list[str]:
    seen = []
    for r in runs:
        for name in r.get("pipeline", {}).get("stages", {}):
            if name not in seen:
                seen.append(name)
    return sorted(seen, key=lambda s: STAGE_ORDER.index(s) if s in STAGE_ORDER else 99)


def pipeline_markdown(result: dict) -> str:
    """The markdown report of :func:`bench_pipeline.bench_pipeline`'s result."""
    runs = [r for r in result.get("runs", []) if "pipeline" in r]
    stages = _stages_seen(runs)
    lines = [
        "# Whole-pipeline benchmark (magnetic demo survey)",
        "",
        f"Machine: {result.get('cpus')} CPUs (shared; load averages before/after each run "
        "are listed). Each size ran in fresh subprocesses (generator, then pipeline).",
        f"Memory: {result.get('memory_method')}.",
        "",
        "## Time (s) and peak memory",
        "",
    ]
    header = [
        "readings",
        "generator s",
        "pipeline s",
        "peak MB",
        *[f"{s} s" for s in stages],
        "status",
        "load 1/5/15 min",
    ]
    rows = []
    for r in runs:
        p = r["pipeline"]
        st = p.get("stages", {})
        status = "complete" if not p.get("error") else "stopped (see below)"
        cells = [r["readings"], r["generate"].get("seconds"), p.get("seconds"), p.get("peak_rss_mb")]
        for s in stages:
            entry = st.get(s, {})
            cells.append(entry.get("seconds") if entry.get("status") == "done" else entry.get("status"))
        cells += [status, "/".join(str(v) for v in r.get("load_before", []))]
        rows.append(cells)
    lines.append(markdown_table(header, rows))
    lines += ["", "## Peak resident memory per stage (MB, VmRSS sampled every 20 ms)", ""]
    header = ["readings", "generator", *stages]
    rows = [
        [
            r["readings"],
            r["generate"].get("peak_rss_mb"),
            *[r["pipeline"].get("stages", {}).get(s, {}).get("peak_rss_mb") for s in stages],
        ]
        for r in runs
    ]
    lines.append(markdown_table(header, rows))
    lines += [
        "",
        "## Accuracy against the scenario's truth",
        "",
        "RMS after removing the mean difference (the anomaly datum is arbitrary up to a "
        "constant); grid: interpolated to the truth grid nodes > 1 km inside the survey.",
        "",
    ]
    header = [
        "readings",
        "anomaly rms nT",
        "anomaly_levelled rms nT",
        "grid rms nT",
        "truth std nT (readings)",
        "grid nodes compared",
    ]
    rows = []
    for r in runs:
        a = r["pipeline"].get("accuracy", {})
        rows.append(
            [
                r["readings"],
                a.get("anomaly_rms_nT"),
                a.get("anomaly_levelled_rms_nT"),
                a.get("grid_rms_nT", a.get("grid_note")),
                a.get("truth_crustal_std_nT"),
                a.get("grid_nodes_compared"),
            ]
        )
    lines.append(markdown_table(header, rows))
    t = result.get("targets", {})
    lines += ["", "## Targets", ""]
    rows = []
    for key, label in (
        ("seconds_1e6", "1e6 readings end to end <= 120 s"),
        ("peak_mb_1e6", "peak memory at 1e6 <= 2048 MB"),
        ("peak_mb_all", "peak memory at every size run <= 2048 MB"),
        ("slope_1e4_1e6", "log-log slope of time, 1e4..1e6, <= 1.1"),
    ):
        entry = t.get(key, {})
        met = entry.get("met")
        verdict = "not measured" if met is None else ("met" if met else "missed")
        extra = entry.get("note", "")
        if key == "seconds_1e6" and entry.get("complete") is False:
            extra = (extra + " pipeline incomplete at 1e6").strip()
        rows.append([label, entry.get("value"), verdict, entry.get("by"), extra])
    lines.append(markdown_table(["target", "measured", "verdict", "over (+) / under (-)", "note"], rows))
    if result.get("skipped"):
        lines += ["", "## Skipped sizes", ""]
        lines.append(
            markdown_table(["readings", "reason"], [[s["readings"], s["reason"]] for s in result["skipped"]])
        )
    errors = [r for r in runs if r["pipeline"].get("error")]
    if errors:
        lines += ["", "## Runs that stopped", ""]
        for r in errors:
            lines.append(f"- {r['readings']:,}: {r['pipeline']['error']}")
    return "\n".join(lines) + "\n"


def pipeline_series(result: dict) -> dict:
    runs = [r for r in result.get("runs", []) if "pipeline" in r]
    x = [r["readings"] for r in runs]
    series = {
        "total (pipeline)": (x, [r["pipeline"].get("seconds") for r in runs]),
        "generator": (x, [r["generate"].get("seconds") for r in runs]),
    }
    for s in _stages_seen(runs):
        series[s] = (
            x,
            [
                r["pipeline"].get("stages", {}).get(s, {}).get("seconds")
                if r["pipeline"].get("stages", {}).get(s, {}).get("status") == "done"
                else None
                for r in runs
            ],
        )
    return series


def write_pipeline_report(result: dict, folder: Path = RESULTS) -> list[Path]:
    """Write ``pipeline.md`` and ``pipeline.png`` into ``folder``; returns the paths."""
    from potfield.io.atomic import write_text

    folder = Path(folder)
    md = write_text(folder / "pipeline.md", pipeline_markdown(result))
    png = loglog_plot(
        folder / "pipeline.png",
        pipeline_series(result),
        xlabel="readings",
        ylabel="seconds",
        title="potfield pipeline: time against readings (log-log)",
        styles={"total (pipeline)": {"color": "black", "lw": 2.5}, "generator": {"color": "0.4", "ls": "--"}},
    )
    return [md, png]


def main(argv: list[str]) -> int:
    path = Path(argv[0]) if argv else RESULTS / "pipeline.bench_pipeline.json"
    record = json.loads(path.read_text())
    result = record.get("result", record)
    for written in write_pipeline_report(result, path.parent):
        print(written)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
