"""The per-survey report: QC maps in out/maps/ and one self-contained out/report.html.

Everything is rebuilt from what is in out/ (the manifest, the cached readings table, the tables
and grids), so ``potfield report DIR`` re-creates the report without recomputing any stage.
"""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path

import numpy as np
import pandas as pd

from ..io.atomic import write_text
from . import maps

CAUTION = ("These results need review by a qualified geophysicist before they are used for any "
           "decision. Local regulations and licensed professional practice prevail over anything "
           "this software produces.")

STAGE_TITLES = {
    "ingest": "Ingest: readings, coverage and geometry",
    "clean": "Clean: flags and noise",
    "diurnal": "Diurnal correction",
    "drift": "Gravity drift, tide and base ties",
    "reference": "Reference field",
    "level": "Line levelling",
    "grid": "Gridding with equivalent sources",
    "separate": "Separation of sources",
    "derive": "Derived products",
    "report": "Report",
}


def _read_table(path: Path) -> pd.DataFrame | None:
    return pd.read_csv(path) if path.is_file() else None


def _fig(figures: dict, stage: str, title: str, path: Path) -> None:
    figures.setdefault(stage, []).append((title, path))


def make_figures(survey, config, manifest: dict, table: pd.DataFrame | None,
                 grid_paths: dict[str, Path]) -> dict[str, list[tuple[str, Path]]]:
    """Draw every QC figure the outputs allow; returns stage -> [(title, png path)]."""
    from ..io.grids import read_netcdf

    figures: dict[str, list[tuple[str, Path]]] = {}
    out = survey.maps
    dpi = config.report.dpi
    stages = manifest.get("stages", {})
    ingest = stages.get("ingest", {}).get("state", {})
    crs_name = ingest.get("crs_name", "survey CRS")
    spec = manifest.get("spec", {})

    def tol(name):
        entry = spec.get(name)
        return entry[0] if entry else None

    if table is not None and len(table):
        _fig(figures, "ingest", "Survey tracks and flagged readings",
             maps.plot_tracks(table, out / "tracks.png", crs_name, dpi))
        if config.kind != "observatory":  # a distance map means nothing for a world-wide network
            _fig(figures, "ingest", "Data coverage",
                 maps.plot_coverage(table, out / "coverage.png", crs_name, ingest.get("line_spacing_m"), dpi))
        if config.kind == "magnetic" and "height" in table and table["height"].notna().any():
            _fig(figures, "ingest", "Height deviation",
                 maps.plot_height_deviation(table, out / "height_deviation.png", crs_name,
                                            tol("drape_tolerance_m"), dpi))
        if (config.kind != "observatory" and "fourth_difference" in table
                and np.isfinite(table["fourth_difference"]).any()):
            _fig(figures, "clean", "Fourth-difference noise profiles",
                 maps.plot_noise_profiles(table, out / "noise_profiles.png",
                                          tolerance=tol("noise_fourth_difference_nT"), dpi=dpi))
        for column, stage, units in (("anomaly", "reference", "nT"), ("bouguer_anomaly", "reference", "mGal"),
                                     ("free_air_anomaly", "reference", "mGal")):
            if column in table and table[column].notna().any():
                _fig(figures, stage, f"{column.replace('_', ' ')} at the readings",
                     maps.plot_points(table, column, out / f"points_{column}.png", crs_name,
                                      f"{column.replace('_', ' ').capitalize()} at the readings", units, dpi))
        if "grid_residual" in table and table["grid_residual"].notna().any():
            units = "mGal" if config.kind == "gravity" else "nT"
            _fig(figures, "grid", "Grid residual at the readings",
                 maps.plot_points(table, "grid_residual", out / "grid_residual_map.png", crs_name,
                                  "Grid residual (observed - model) at the readings", units, dpi))
            _fig(figures, "grid", "Grid residual histogram",
                 maps.plot_histograms({"grid residual": table["grid_residual"].to_numpy(float)},
                                      out / "grid_residual_hist.png", "Grid residual", units, dpi))

    base = _read_table(survey.tables / "base_record.csv")
    if base is not None and len(base):
        value_cols = [c for c in base.columns if c not in ("time", "station", "base", "name")
                      and pd.api.types.is_numeric_dtype(base[c])]
        if "time" in base and value_cols:
            series = {c: base[c].to_numpy(float) for c in value_cols[:4]}
            band = None
            t15 = tol("diurnal_chord_60s_nT")
            first = next(iter(series.values()))
            if t15 and np.isfinite(first).any():
                smooth = pd.Series(first).rolling(61, center=True, min_periods=1).median().to_numpy()
                band = (smooth - t15, smooth + t15)
            _fig(figures, "diurnal", "Base-station record",
                 maps.plot_timeseries(base["time"], series, out / "diurnal_record.png",
                                      "Base-station record" + (f" with ±{t15:g} nT band about its 60 s median"
                                                               if band else ""), "nT", band, dpi))
    loops = _read_table(survey.tables / "loops.csv")
    if loops is not None and len(loops):
        rate = next((c for c in loops.columns if "rate" in c), None)
        if rate:
            label = loops[loops.columns[0]]
            _fig(figures, "drift", "Drift rate per loop",
                 maps.plot_bars(label, loops[rate].to_numpy(float), out / "drift_rates.png",
                                "Drift rate per loop", "mGal/h", tol("gravity_drift_rate_mgal_per_h"), dpi))
    cx = _read_table(survey.tables / "crossovers.csv")
    if cx is not None and len(cx) and "difference" in cx:
        series = {"before levelling": cx["difference"].to_numpy(float)}
        after = next((c for c in cx.columns if c.startswith("difference_after") or c == "difference_levelled"), None)
        if after:
            series["after levelling"] = cx[after].to_numpy(float)
        units = "mGal" if config.kind == "gravity" else "nT"
        _fig(figures, "level", "Crossover differences",
             maps.plot_histograms(series, out / "crossovers.png", "Crossover differences", units, dpi))
    for stage_name, entry in stages.items():
        for name in entry.get("grids", []):
            path = grid_paths.get(name)
            if path is None or not Path(path).is_file():
                continue
            grid = read_netcdf(path)
            _fig(figures, stage_name, name.replace("_", " "),
                 maps.plot_grid(grid.rename(name), out / f"grid_{name}.png", crs_name, dpi=dpi))
    sep = stages.get("separate", {}).get("grids", [])
    regional = [g for g in sep if "regional" in g]
    residual = [g for g in sep if "residual" in g]
    if regional and residual:
        panel = [read_netcdf(grid_paths[regional[0]]).rename(regional[0]),
                 read_netcdf(grid_paths[residual[0]]).rename(residual[0])]
        _fig(figures, "separate", "Regional and residual",
             maps.plot_panels(panel, out / "separation_panels.png", crs_name, "Regional / residual split", dpi))
    for coef_name in ("coefficients", "gauss_coefficients"):
        coef = _read_table(survey.tables / f"{coef_name}.csv")
        if coef is not None and "time" in coef:
            cols = [c for c in coef.columns if c != "time" and pd.api.types.is_numeric_dtype(coef[c])][:8]
            _fig(figures, "separate", "Coefficient time series",
                 maps.plot_timeseries(coef["time"], {c: coef[c].to_numpy(float) for c in cols},
                                      out / "coefficients.png", "Gauss coefficients", "nT", None, dpi))
    return figures


def _img(path: Path, title: str) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode()
    return (f'<figure><img alt="{html.escape(title)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{html.escape(title)}</figcaption></figure>")


def _table(rows: list[dict], columns: list[str]) -> str:
    if not rows:
        return "<p>none</p>"
    head = "".join(f"<th>{html.escape(c)}</th>" for c in columns)
    body = []
    for row in rows:
        cells = []
        for c in columns:
            value = row.get(c, "")
            if isinstance(value, float):
                value = f"{value:.4g}"
            css = ' class="fail"' if c == "result" and value == "fail" else ""
            cells.append(f"<td{css}>{html.escape(str(value))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


def _metrics(metrics: dict) -> str:
    rows = []
    for key, value in metrics.items():
        if isinstance(value, (dict, list)):
            value = json.dumps(value, default=str)
            if len(value) > 300:
                value = value[:300] + " ..."
        rows.append({"quantity": key.replace("_", " "), "value": value})
    return _table(rows, ["quantity", "value"])


STYLE = """
body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222;line-height:1.4}
h1{border-bottom:2px solid #444}h2{border-bottom:1px solid #aaa;margin-top:2em}
table{border-collapse:collapse;margin:0.5em 0;font-size:0.85em}
td,th{border:1px solid #ccc;padding:2px 6px;text-align:left;vertical-align:top}
th{background:#eee}td.fail{background:#f6c6c6;font-weight:bold}
figure{display:inline-block;margin:0.5em;max-width:100%}img{max-width:100%;border:1px solid #ddd}
figcaption{font-size:0.8em;color:#555}.caution{background:#fff4d6;border:1px solid #e0b000;padding:0.6em}
.note{color:#333}.warning{color:#a00}
"""

#: Small self-check: marks on <body> how many images decoded (read by the report test in a browser).
SCRIPT = """
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length;
  document.body.setAttribute('data-images-total', String(imgs.length));
  document.body.setAttribute('data-images-loaded', String(ok));
});
"""


def render_html(config, manifest: dict, figures: dict, checks: list[dict]) -> str:
    stages = manifest.get("stages", {})
    ingest = stages.get("ingest", {})
    title = config.report.title or f"potfield report: {config.survey.name}"
    failed = [c for c in checks if c.get("result") == "fail"]
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
             f"<style>{STYLE}</style><script>{SCRIPT}</script></head><body>",
             f"<h1>{html.escape(title)}</h1>",
             f"<p class='caution'><b>Caution.</b> {html.escape(CAUTION)}</p>",
             "<h2 id='summary'>Survey summary</h2>"]
    im = ingest.get("metrics", {})
    summary = {
        "survey": config.survey.name, "kind": config.kind, "readings": im.get("readings"),
        "lines": f"{im.get('traverse_lines')} traverse, {im.get('tie_lines')} tie",
        "time span (UTC)": f"{im.get('time_start')} .. {im.get('time_end')}",
        "output CRS": im.get("crs"), "spec checks": f"{len(checks)} run, {len(failed)} failed",
        "stages": ", ".join(f"{k} ({v.get('status')})" for k, v in stages.items()),
    }
    parts.append(_metrics(summary))
    parts.append("<h2 id='failed-checks'>Failed spec checks</h2>")
    cols = ["stage", "check", "value", "sense", "tolerance", "unit", "result", "source", "detail"]
    parts.append(_table(failed, cols) if failed else "<p>All spec checks passed.</p>")
    from ..pipeline import KIND_ORDER

    ordered = [n for n in KIND_ORDER[config.kind] if n in stages]
    for name in ordered:
        entry = stages[name]
        if name == "report":
            continue
        parts.append(f"<h2 id='stage-{name}'>{html.escape(STAGE_TITLES.get(name, name))}</h2>")
        status = entry.get("status")
        if status != "done":
            parts.append(f"<p class='note'>Status: {html.escape(str(status))}. "
                         f"{html.escape(entry.get('summary', ''))}</p>")
            continue
        for note in entry.get("notes", []):
            parts.append(f"<p class='note'>{html.escape(str(note))}</p>")
        for warning in entry.get("warnings", []):
            parts.append(f"<p class='warning'>Warning: {html.escape(str(warning))}</p>")
        if entry.get("metrics"):
            parts.append(_metrics(entry["metrics"]))
        stage_checks = [c for c in checks if c.get("stage") == name]
        if stage_checks:
            parts.append("<h3>Spec checks</h3>" + _table(stage_checks, cols))
        for fig_title, path in figures.get(name, []):
            parts.append(_img(path, fig_title))
    parts.append("<h2 id='provenance'>Provenance</h2>")
    prov = {"potfield": manifest.get("potfield_version"), "config hash (SHA-256)": manifest.get("config_hash"),
            "packages": ", ".join(f"{k} {v}" for k, v in manifest.get("packages", {}).items())}
    parts.append(_metrics(prov))
    parts.append("<h3>Inputs (SHA-256)</h3>")
    parts.append(_table([{"file": k, "sha256": v} for k, v in manifest.get("inputs", {}).items()],
                        ["file", "sha256"]))
    parts.append("<h3>Stage timings</h3>")
    parts.append(_table([{"stage": k, "status": v.get("status"), "seconds": v.get("seconds", ""),
                          "finished (UTC)": v.get("finished", "")} for k, v in stages.items()],
                        ["stage", "status", "seconds", "finished (UTC)"]))
    parts.append("<h2 id='cautions'>Cautions</h2>")
    parts.append(f"<p class='caution'>{html.escape(CAUTION)}</p>")
    parts.append("<p>All numbers trace back to the raw readings through out/tables/readings.csv "
                 "(source_file, source_row) and out/manifest.json.</p></body></html>")
    return "\n".join(parts)


def build_report(survey, config, manifest: dict, table: pd.DataFrame | None,
                 grid_paths: dict[str, Path]) -> tuple[Path, int]:
    """Draw the maps and write out/report.html; returns (path, number of figures)."""
    figures = make_figures(survey, config, manifest, table, grid_paths)
    checks = []
    for name, entry in manifest.get("stages", {}).items():
        for check in entry.get("checks", []):
            checks.append({**check, "stage": name})
    text = render_html(config, manifest, figures, checks)
    write_text(survey.report_path, text)
    return survey.report_path, sum(len(v) for v in figures.values())


def rebuild_report(root: Path) -> Path:
    """``potfield report DIR``: rebuild maps and report.html from out/ without recomputing."""
    from ..errors import StageError
    from ..pipeline import KIND_ORDER, read_cache_table
    from ..qc.specs import load_spec
    from ..survey import Survey

    survey = Survey(root)
    config = survey.load_config()
    if not survey.manifest_path.is_file():
        raise StageError(f"{survey.out}: no results to report on",
                         fix=f"run 'potfield run {survey.root}' first")
    manifest = json.loads(survey.manifest_path.read_text())
    manifest["spec"] = {k: list(v) for k, v in load_spec(config, survey).items()}
    table = None
    for name in reversed(KIND_ORDER[config.kind]):
        path = survey.cache / f"{name}.parquet"
        if path.is_file() and manifest.get("stages", {}).get(name, {}).get("table"):
            table = read_cache_table(path)
            break
    grid_paths = {p.stem: p for p in survey.grids.glob("*.nc") if p.stem != "products"}
    with survey.lock():
        path, _ = build_report(survey, config, manifest, table, grid_paths)
    return path
