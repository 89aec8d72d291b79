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
        "pipeline s: `run_survey` inside the measuring process (no start-up or imports); "
        "potfield run s: `python -m potfield.cli run FOLDER --force` timed from launch to exit "
        "(start-up, imports, every stage, out/), run after it (warm numba and file caches); "
        "'-' where not run (sizes above POTFIELD_BENCH_CLI_MAX).",
        "",
    ]
    header = [
        "readings",
        "generator s",
        "pipeline s",
        "potfield run s",
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
        cells = [
            r["readings"],
            r["generate"].get("seconds"),
            p.get("seconds"),
            r.get("cli", {}).get("seconds"),
            p.get("peak_rss_mb"),
        ]
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
    lines += _side_by_side(result, runs)
    lines += _targets_markdown(result.get("targets", {}))
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


def _side_by_side(result: dict, runs: list) -> list[str]:
    """potfield's grid stage against harmonica's EquivalentSourcesGB on the same blocks."""
    compared = [r for r in runs if r.get("harmonica_gb")]
    settings = result.get("gb_settings", {})
    gb_max = f"{result['gb_max_readings']:,}" if result.get("gb_max_readings") else "-"
    lines = [
        "",
        "## Gridding side by side: potfield's grid stage and harmonica's EquivalentSourcesGB",
        "",
        "Same data: block medians of the levelled anomaly at the grid stage's block size and the "
        "depth it chose (out/manifest.json). potfield s: the whole grid stage (depth/damping "
        "search, fit, grid, prediction at every reading); GB: harmonica 0.7 EquivalentSourcesGB "
        f"(Soler and Uieda 2021, GJI 227:1768), window {settings.get('window_size', '-')} "
        f"(about 5,000 blocks per window), damping {settings.get('damping', '-')}, in its own "
        "process after a warm-up (numba compilation untimed), predicted on the stage's grid nodes. "
        "Grid RMS: both grids against the truth exactly as in the accuracy table. Peak MB: "
        "potfield's grid stage (VmRSS while it ran, the table included) and the GB process "
        f"(ru_maxrss, the levelled table included). GB runs up to {gb_max} readings "
        "(POTFIELD_BENCH_GB_MAX).",
        "",
    ]
    if not compared:
        return [*lines, "GB was not run at any size.", ""]
    header = [
        "readings",
        "blocks",
        "potfield grid s",
        "GB fit s",
        "GB predict s",
        "GB fit+predict s",
        "potfield grid RMS nT",
        "GB grid RMS nT",
        "potfield grid peak MB",
        "GB peak MB",
        "GB windows",
        "GB window m",
        "depth m",
        "damping potfield / GB",
    ]
    rows = []
    for r in compared:
        gb, p = r["harmonica_gb"], r["pipeline"]
        grid = p.get("stages", {}).get("grid", {})
        if gb.get("error"):
            rows.append([r["readings"], None, grid.get("seconds"), gb["error"][:80], *[None] * 10])
            continue
        rows.append(
            [
                r["readings"],
                gb.get("blocks"),
                grid.get("seconds"),
                gb.get("fit_s"),
                gb.get("predict_s"),
                None if gb.get("fit_s") is None else gb["fit_s"] + gb["predict_s"],
                p.get("accuracy", {}).get("grid_rms_nT"),
                gb.get("accuracy", {}).get("grid_rms_nT"),
                grid.get("peak_rss_mb"),
                gb.get("peak_rss_mb"),
                gb.get("windows"),
                gb.get("window_m") or "one window",
                gb.get("depth_m"),
                f"{gb.get('stage_damping'):g} / {gb.get('gb_damping'):g}",
            ]
        )
    return [*lines, markdown_table(header, rows), ""]


#: (key, label) of the targets table, in order.
TARGET_LABELS = (
    ("seconds_1e4", "1e4 readings end to end <= 5 s"),
    ("seconds_1e6", "1e6 readings end to end <= 60 s"),
    ("peak_mb_1e6", "1e6 readings peak memory <= 1500 MB"),
    ("grid_rms_1e6", "1e6 readings grid RMS off the true grid <= 0.1 nT"),
    ("seconds_1e7", "1e7 readings end to end <= 600 s"),
    ("peak_mb_1e7", "1e7 readings peak memory <= 2048 MB"),
    ("slope", "log-log slope of pipeline time against readings <= 1.1"),
)


def _targets_markdown(targets: dict) -> list[str]:
    lines = ["## Targets (issue 20)", ""]
    rows = []
    for key, label in TARGET_LABELS:
        entry = targets.get(key, {})
        met = entry.get("met")
        verdict = "not measured" if met is None else ("met" if met else "missed")
        by = entry.get("by")
        if by is not None:
            unit = entry.get("unit", "")
            pct = f" ({by / entry['target']:+.0%})" if entry.get("target") else ""
            by = f"{by:+,.4g} {unit}".rstrip() + pct
        rows.append([label, entry.get("readings"), entry.get("value"), verdict, by, entry.get("note", "")])
    lines.append(
        markdown_table(
            ["target", "readings run", "measured", "verdict", "over (+) / under (-)", "note"], rows
        )
    )
    slope = targets.get("slope", {})
    sizes = slope.get("sizes") or []
    lines += [
        "",
        "## Cost slope",
        "",
        "Least-squares slope of log(pipeline s) against log(readings) over every complete run "
        f"from 1e4 to 1e7 readings; sizes used: {', '.join(f'{n:,}' for n in sizes) or 'none'}"
        + (
            f"; slope {slope['value']}."
            if slope.get("value") is not None
            else " (fewer than two sizes: no slope)."
        ),
    ]
    if sizes and (min(sizes) > 20_000 or max(sizes) < 5_000_000):
        lines.append("The sizes run do not span 1e4..1e7, so the slope covers only their range.")
    return lines


def pipeline_series(result: dict) -> dict:
    runs = [r for r in result.get("runs", []) if "pipeline" in r]
    x = [r["readings"] for r in runs]
    series = {
        "total (pipeline)": (x, [r["pipeline"].get("seconds") for r in runs]),
        "generator": (x, [r["generate"].get("seconds") for r in runs]),
    }
    gb = [r.get("harmonica_gb", {}) for r in runs]
    if any(g.get("fit_s") is not None for g in gb):
        series["harmonica GB fit+predict"] = (
            x,
            [None if g.get("fit_s") is None else g["fit_s"] + g["predict_s"] for g in gb],
        )
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
    sys.path.insert(0, str(HERE))
    from bench_pipeline import _targets

    result["targets"] = _targets(result.get("runs", []))  # today's targets, also for older runs
    for written in write_pipeline_report(result, path.parent):
        print(written)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
