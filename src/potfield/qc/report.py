"""The per-survey report: QC maps in out/maps/ and one self-contained out/report.html.

Everything is rebuilt from what is in out/ (the manifest, the cached readings table, the tables
and grids), so ``potfield report DIR`` re-creates the report without recomputing any stage.
"""

from __future__ import annotations

import base64
import html
import json
import re
from functools import partial
from pathlib import Path

import numpy as np
import pandas as pd

from ..io.atomic import write_text
from ..kinds import KIND_ORDER

CAUTION = (
    "These results need review by a qualified geophysicist before they are used for any "
    "decision. Local regulations and licensed professional practice prevail over anything "
    "this software produces."
)

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


#: Captions of the stage sections in gravity words (stations, loops, base ties).
GRAVITY_TITLES = {
    "ingest": "Ingest: stations, coverage and geometry",
    "level": "Levelling of loops (when lines are given)",
}

#: Why a tolerance of a spec profile may have no automatic check (listed in the report).
NOT_CHECKED = {
    "drape_tolerance_m": "shown on the height-deviation map; the planned drape surface is not an "
    "input, so no automatic pass/fail",
    "diurnal_chord_300s_nT": "no check of a 5-minute chord is implemented yet",
    "crossover_rms_mGal": "no crossovers: a loop survey has no intersecting lines",
}


def _read_table(path: Path) -> pd.DataFrame | None:
    return pd.read_csv(path) if path.is_file() else None


def _fig(figures: dict, stage: str, title: str, draw: partial) -> None:
    """Queue one figure: ``draw()`` draws and writes it and returns its path (see
    :func:`potfield.qc.render.render_all`)."""
    figures.setdefault(stage, []).append((title, draw))


class GridReader:
    """Reads each grid file once per report (the maps, the panels and the deliverables table all
    use the same grids)."""

    def __init__(self):
        self._grids: dict[Path, object] = {}

    def __call__(self, path: Path):
        from ..io.grids import read_netcdf

        path = Path(path)
        if path not in self._grids:
            self._grids[path] = read_netcdf(path)
        return self._grids[path]


def field_unit(kind: str) -> str:
    return "mGal" if kind == "gravity" else "nT"


def make_figures(
    survey,
    config,
    manifest: dict,
    table: pd.DataFrame | None,
    grid_paths: dict[str, Path],
    read_grid: GridReader | None = None,
) -> dict[str, list[tuple[str, Path]]]:
    """Draw every QC figure the outputs allow; returns stage -> [(caption, png path)]."""
    from . import maps

    read_netcdf = read_grid or GridReader()
    figures: dict[str, list[tuple[str, Path]]] = {}
    out = survey.maps
    dpi = config.report.dpi
    stages = manifest.get("stages", {})
    ingest = stages.get("ingest", {}).get("state", {})
    crs_name = ingest.get("crs_name", "survey CRS")
    spec = manifest.get("spec", {})
    units = field_unit(config.kind)
    name = config.survey.name
    gravity = config.kind == "gravity"

    def tol(key):
        entry = spec.get(key)
        return entry[0] if entry else None

    if table is not None and len(table):
        if config.kind == "observatory":
            stations = table.groupby("station", sort=True)[["longitude", "latitude"]].first().reset_index()
            _fig(
                figures,
                "ingest",
                "Observatory stations on a longitude-latitude map",
                partial(maps.plot_station_map, stations, out / "stations.png", dpi=dpi),
            )
            parts = [c for c in ("disturbance_north", "disturbance_east", "disturbance_down") if c in table]
            if parts:
                _fig(
                    figures,
                    "reference",
                    "Disturbance (observed minus IGRF-14) at each station",
                    partial(maps.plot_station_series, table, parts, out / "station_series.png", dpi=dpi),
                )
        else:
            _fig(
                figures,
                "ingest",
                (
                    "Stations coloured by loop, flagged readings marked"
                    if gravity
                    else "Survey lines and flagged readings"
                ),
                partial(
                    maps.plot_tracks,
                    table,
                    out / "tracks.png",
                    crs_name,
                    dpi,
                    f"Stations coloured by loop ({table['line'].nunique()} loops)" if gravity else None,
                    survey=name,
                ),
            )
            _fig(
                figures,
                "ingest",
                "Distance from every point of the area to the nearest "
                + ("station" if gravity else "reading"),
                partial(
                    maps.plot_coverage,
                    table,
                    out / "coverage.png",
                    crs_name,
                    ingest.get("line_spacing_m"),
                    dpi,
                    survey=name,
                    spacing_label="median station spacing" if gravity else "nominal line spacing",
                ),
            )
        if config.kind == "magnetic" and "height" in table and table["height"].notna().any():
            _fig(
                figures,
                "ingest",
                "Sensor height minus the smoothed flying surface",
                partial(
                    maps.plot_height_deviation,
                    table,
                    out / "height_deviation.png",
                    crs_name,
                    tol("drape_tolerance_m"),
                    dpi,
                ),
            )
        if (
            config.kind == "magnetic"
            and "fourth_difference" in table
            and np.isfinite(table["fourth_difference"]).any()
        ):
            _fig(
                figures,
                "clean",
                "Fourth-difference noise along lines",
                partial(
                    maps.plot_noise_profiles,
                    table,
                    out / "noise_profiles.png",
                    tolerance=tol("noise_fourth_difference_nT"),
                    dpi=dpi,
                ),
            )
        words = {
            "anomaly": ("Total-field anomaly at the readings", "nT"),
            "bouguer_anomaly": ("Bouguer anomaly at the stations", "mGal"),
            "free_air_anomaly": ("Free-air anomaly at the stations", "mGal"),
        }
        for column, (caption, unit) in words.items():
            if column in table and table[column].notna().any() and config.kind != "observatory":
                _fig(
                    figures,
                    "reference",
                    caption,
                    partial(
                        maps.plot_points,
                        table,
                        column,
                        out / f"points_{column}.png",
                        crs_name,
                        f"{caption} ({unit})",
                        unit,
                        dpi,
                        survey=name,
                    ),
                )
        if (
            config.kind == "magnetic"
            and "anomaly_levelled" in table
            and "distance" in table
            and table["anomaly_levelled"].notna().any()
        ):
            _fig(
                figures,
                "level",
                "Levelled anomaly along a selection of lines",
                partial(
                    maps.plot_line_profiles,
                    table,
                    "anomaly_levelled",
                    out / "line_profiles.png",
                    "nT",
                    title="Levelled total-field anomaly along lines",
                    dpi=dpi,
                ),
            )
        if "grid_residual" in table and table["grid_residual"].notna().any():
            _fig(
                figures,
                "grid",
                "Grid residual: each reading minus the gridding model",
                partial(
                    maps.plot_grid_residual,
                    table,
                    out / "grid_residual.png",
                    crs_name,
                    units,
                    tol(f"grid_residual_rms_{units}"),
                    dpi,
                    survey=name,
                ),
            )

    base = _read_table(survey.tables / "base_record.csv")
    if base is not None and len(base) and {"time", "total_field"} <= set(base.columns):
        _fig(
            figures,
            "diurnal",
            "Base-station record: variation about its median",
            partial(
                maps.plot_base_record, base, out / "diurnal_record.png", tol("diurnal_chord_60s_nT"), dpi
            ),
        )
    loops = _read_table(survey.tables / "loops.csv")
    if loops is not None and len(loops):
        rate = next((c for c in loops.columns if "rate" in c and "sigma" not in c), None)
        if rate:
            _fig(
                figures,
                "drift",
                "Drift rate of each loop",
                partial(
                    maps.plot_bars,
                    loops[loops.columns[0]],
                    loops[rate].to_numpy(float),
                    out / "drift_rates.png",
                    "Drift rate of each loop",
                    "drift rate (mGal/h)",
                    tol("gravity_drift_rate_mgal_per_h"),
                    dpi,
                ),
            )
    cx = _read_table(survey.tables / "crossovers.csv")
    try:  # the level stage's own figure (qc/level_plots.py), when this version has it
        from . import level_plots
    except ImportError:
        level_plots = None
    if cx is not None and len(cx) and "difference" in cx and level_plots is not None:
        _fig(
            figures,
            "level",
            "Crossover misclosures before and after levelling",
            partial(level_plots.plot_crossover_histograms, cx, out / level_plots.FIGURE_NAME, units, dpi),
        )
    elif cx is not None and len(cx) and "difference" in cx:
        series = {"before levelling": cx["difference"].to_numpy(float)}
        after = next(
            (c for c in cx.columns if c.startswith("difference_after") or c == "difference_levelled"), None
        )
        if after:
            series["after levelling"] = cx[after].to_numpy(float)
        _fig(
            figures,
            "level",
            "Crossover differences before and after levelling",
            partial(
                maps.plot_histograms,
                series,
                out / "crossovers.png",
                "Crossover differences",
                f"line minus tie ({units})",
                dpi,
            ),
        )

    for stage_name in KIND_ORDER.get(config.kind, ()):
        for grid_name in stages.get(stage_name, {}).get("grids", []):
            path = grid_paths.get(grid_name)
            if path is None or not Path(path).is_file():
                continue
            grid = read_netcdf(path).rename(grid_name)
            caption = maps.quantity_title(grid_name, grid.attrs.get("long_name"))
            _fig(
                figures,
                stage_name,
                caption,
                partial(maps.plot_grid, grid, out / f"grid_{grid_name}.png", crs_name, dpi=dpi, survey=name),
            )
    sep = stages.get("separate", {}).get("grids", [])
    regional = [g for g in sep if "regional" in g]
    residual = [g for g in sep if "residual" in g]
    if regional and residual and regional[0] in grid_paths and residual[0] in grid_paths:
        panel = [
            read_netcdf(grid_paths[regional[0]]).rename(regional[0]),
            read_netcdf(grid_paths[residual[0]]).rename(residual[0]),
        ]
        _fig(
            figures,
            "separate",
            "Regional and residual fields side by side",
            partial(
                maps.plot_panels,
                panel,
                out / "separation_panels.png",
                crs_name,
                "Field = regional + residual",
                dpi,
                survey=name,
            ),
        )
    for coef_name in ("coefficients", "gauss_coefficients"):
        coef = _read_table(survey.tables / f"{coef_name}.csv")
        if coef is not None and "time" in coef and len(coef):
            _fig(
                figures,
                "separate",
                "Gauss coefficients of the internal and external fields",
                partial(maps.plot_coefficients, coef, out / "coefficients.png", dpi=dpi),
            )
            break
    from .render import render_all

    draws = [draw for queued in figures.values() for _, draw in queued]
    paths = iter(render_all(draws))
    return {stage: [(title, next(paths)) for title, _ in queued] for stage, queued in figures.items()}


def _img(path: Path, title: str) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode()
    return (
        f'<figure><img alt="{html.escape(title)}" src="data:image/png;base64,{data}">'
        f"<figcaption>{html.escape(title)}</figcaption></figure>"
    )


def fmt(value) -> str:
    """A number with meaningful digits for a reader (no exponent for everyday magnitudes, no NaN)."""
    if value is None:
        return "-"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not np.isfinite(v):
            return "-"
        a = abs(v)
        if a == 0:
            return "0"
        if a >= 1e4:
            return f"{v:,.1f}"
        if a >= 1:
            return f"{v:.4g}" if a < 1000 else f"{v:.1f}"
        if a >= 1e-4:
            return f"{v:.3g}"
        return f"{v:.2g}"
    if isinstance(value, dict):
        return "; ".join(f"{str(k).replace('_', ' ')}: {fmt(v)}" for k, v in value.items())
    if isinstance(value, (list, tuple)):
        text = ", ".join(fmt(v) for v in value[:12])
        return text + (f" ... ({len(value)} values)" if len(value) > 12 else "")
    return str(value)


def _table(rows: list[dict], columns: list[str], headers: dict[str, str] | None = None) -> str:
    if not rows:
        return "<p>none</p>"
    headers = headers or {}
    head = "".join(f"<th>{html.escape(headers.get(c, c))}</th>" for c in columns)
    body = []
    for row in rows:
        cells = []
        for c in columns:
            value = row.get(c, "")
            text = value if isinstance(value, str) else fmt(value)
            css = ' class="fail"' if c == "result" and value == "fail" else ""
            raw = c.endswith("_html")
            cells.append(f"<td{css}>{text if raw else html.escape(str(text))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


#: Metric-name endings and the unit they carry.
_SUFFIX_UNITS = (
    ("_mgal_per_h", "mGal/h"),
    ("_mgal", "mGal"),
    ("_mGal", "mGal"),
    ("_nT", "nT"),
    ("_m", "m"),
    ("_s", "s"),
    ("_deg", "degrees"),
    ("_km", "km"),
)


def metric_unit(key: str, kind: str) -> tuple[str, str]:
    """(label in words, unit) of a metric name."""
    for suffix, unit in _SUFFIX_UNITS:
        if key.endswith(suffix):
            return key[: -len(suffix)].replace("_", " "), unit
    words = key.replace("_", " ")
    if key.startswith("time_"):
        return words, "UTC"
    if any(w in key for w in ("rms", "residual", "difference", "crossover", "regional")):
        return words, field_unit(kind)
    return words, ""


#: Gravity surveys are stations in loops: line words renamed or left out (None).
GRAVITY_WORDS = {
    "traverse_lines": "loops_in_readings",
    "tie_lines": None,
    "tie_spacing_m": None,
    "line_spacing_m": "median_station_spacing_m",
}


def _metrics(metrics: dict, kind: str) -> str:
    rows = []
    for key, value in metrics.items():
        if kind == "gravity" and key in GRAVITY_WORDS:
            key = GRAVITY_WORDS[key]
            if key is None:
                continue
        label, unit = metric_unit(str(key), kind)
        rows.append({"quantity": label, "value": value, "unit": unit})
    return _table(rows, ["quantity", "value", "unit"])


CHECK_COLUMNS = ["stage", "check", "value", "sense", "tolerance", "unit", "result", "source", "detail"]
CHECK_HEADERS = {
    "value": "measured value (unit)",
    "tolerance": "tolerance (unit)",
    "sense": "pass if",
    "unit": "unit",
    "source": "tolerance source",
}

STYLE = """
body{font-family:sans-serif;max-width:1100px;margin:2em auto;color:#222;line-height:1.4}
h1{border-bottom:2px solid #444}h2{border-bottom:1px solid #aaa;margin-top:2em}
table{border-collapse:collapse;margin:0.5em 0;font-size:0.85em}
td,th{border:1px solid #ccc;padding:2px 6px;text-align:left;vertical-align:top}
th{background:#eee}td.fail{background:#f6c6c6;font-weight:bold}
figure{display:inline-block;margin:0.5em;max-width:100%}img{max-width:100%;border:1px solid #ddd}
figcaption{font-size:0.8em;color:#555}.caution{background:#fff4d6;border:1px solid #e0b000;padding:0.6em}
.note{color:#333}.warning{color:#a00}nav ol{columns:2}pre{background:#f6f6f6;padding:0.6em;
overflow-x:auto;font-size:0.8em}
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


def _grid_rows(
    manifest: dict, grid_paths: dict[str, Path], order, read_grid: GridReader | None = None
) -> list[dict]:
    from . import maps

    read_netcdf = read_grid or GridReader()
    rows = []
    stages = manifest.get("stages", {})
    for stage in order:
        for name in stages.get(stage, {}).get("grids", []):
            path = grid_paths.get(name)
            if path is None or not Path(path).is_file():
                continue
            grid = read_netcdf(path)
            values = np.asarray(grid.values, float)
            finite = values[np.isfinite(values)]
            unit = grid.attrs.get("units", "")
            rows.append(
                {
                    "file_html": f"<a href='grids/{html.escape(name)}.nc'>{html.escape(name)}.nc</a>",
                    "quantity": maps.quantity_title(name, grid.attrs.get("long_name")),
                    "unit": unit,
                    "stage": stage,
                    "minimum": float(finite.min()) if finite.size else None,
                    "maximum": float(finite.max()) if finite.size else None,
                    "cells": f"{grid.sizes.get('easting', 0)} x {grid.sizes.get('northing', 0)}",
                }
            )
    return rows


_UNIT_WORDS = {"m", "s", "nt", "mgal", "per", "h", "max", "fraction", "rms", "tolerance", "gravity"}

#: What each table holds, in words (report deliverables list).
TABLE_WORDS = {
    "readings": "residual table: every reading with every correction, traceable to its raw line",
    "columns": "data dictionary: unit, meaning and stage of every column",
    "checks": "spec checks with their tolerances",
    "clean_lines": "readings and flags per line",
    "grid_cv": "cross-validation of the gridding: held-out score per trial depth and damping",
    "loops": "drift and offset of each loop",
    "stations": "adjusted gravity at each station",
    "repeats": "repeat readings at stations",
    "tares": "tares (steps of the meter) estimated",
    "crossovers": "crossovers of traverse and tie lines, before and after levelling",
    "lines": "levelling correction and crossover RMS per line",
    "diurnal_lines": "diurnal correction per line",
    "base_record": "cleaned base-station record",
    "coefficients": "Gauss coefficients per epoch",
    "station_residuals": "residual of each observatory after the fit",
    "reference_stations": "IGRF-14 and mean disturbance at each observatory",
    "grid_tiles": "tiles of the tiled gridding",
}


def _tolerance_rows(spec: dict, checks: list[dict]) -> list[dict]:
    rows = []
    for key, entry in spec.items():
        value, source = entry[0], entry[1]
        words = {w for w in key.lower().split("_") if w not in _UNIT_WORDS}
        used = [
            c
            for c in checks
            if isinstance(c.get("tolerance"), (int, float))
            and np.isclose(c["tolerance"], value)
            and words & set(re.findall(r"[a-z0-9]+", str(c.get("check", "")).lower().replace("_", " ")))
        ]
        if used:
            status = "checked: " + "; ".join(f"{c['check']} ({c['result']})" for c in used)
        else:
            status = "not checked: " + NOT_CHECKED.get(key, "no stage of this run measured it")
        rows.append({"tolerance": key.replace("_", " "), "value": value, "source": source, "status": status})
    return rows


#: Residual and correction columns summarised in the deliverables (when present).
RESIDUAL_COLUMNS = (
    "grid_residual",
    "drift_residual",
    "level_correction",
    "diurnal",
    "tide",
    "drift",
    "terrain",
    "residual",
    "disturbance_total",
)


#: Columns of the readings table the report uses: positions and lines for the maps, the flags,
#: the values drawn (anomalies before gridding, levelled profiles, grid residuals, noise,
#: observatory disturbances) and the residual/correction columns it tabulates.
REPORT_READS = (
    "easting",
    "northing",
    "height",
    "longitude",
    "latitude",
    "time",
    "line",
    "line_type",
    "station",
    "distance",
    "flag_*",
    "fourth_difference",
    "anomaly",
    "anomaly_levelled",
    "bouguer_anomaly",
    "free_air_anomaly",
    "disturbance_*",
    *RESIDUAL_COLUMNS,
)


def residual_rows(table: pd.DataFrame | None, kind: str) -> list[dict]:
    """RMS, smallest and largest value of each residual/correction column at the readings."""
    from ..io.columns import describe

    rows = []
    if table is None:
        return rows
    for name in RESIDUAL_COLUMNS:
        if name not in table:
            continue
        values = pd.to_numeric(table[name], errors="coerce").to_numpy(dtype=float)
        values = values[np.isfinite(values)]
        if not values.size:
            continue
        unit, meaning, _ = describe(name, kind)
        rows.append(
            {
                "column": name,
                "meaning": meaning,
                "unit": unit,
                "readings": int(values.size),
                "rms": float(np.sqrt(np.mean(values**2))),
                "minimum": float(values.min()),
                "maximum": float(values.max()),
            }
        )
    return rows


def render_html(
    config,
    manifest: dict,
    figures: dict,
    checks: list[dict],
    grid_paths: dict[str, Path] | None = None,
    survey_toml: str | None = None,
    tables: list[Path] | None = None,
    table: pd.DataFrame | None = None,
    read_grid: GridReader | None = None,
) -> str:
    """The report page: contents, deliverables, failed checks, QC per stage, provenance."""

    stages = manifest.get("stages", {})
    order = [n for n in KIND_ORDER.get(config.kind, ()) if n in stages]
    ingest = stages.get("ingest", {})
    title = config.report.title or f"potfield report: {config.survey.name}"
    failed = [c for c in checks if c.get("result") == "fail"]
    kind = config.kind
    gravity = kind == "gravity"
    titles = {**STAGE_TITLES, **(GRAVITY_TITLES if gravity else {})}
    sections = [
        ("summary", "Survey summary"),
        ("deliverables", "Deliverables"),
        ("failed-checks", "Failed spec checks"),
        ("tolerances", "Spec tolerances"),
    ]
    sections += [(f"stage-{n}", titles.get(n, n)) for n in order if n != "report"]
    sections += [("provenance", "Provenance"), ("cautions", "Cautions")]
    parts = [
        f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
        f"<style>{STYLE}</style><script>{SCRIPT}</script></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f"<p class='caution'><b>Caution.</b> {html.escape(CAUTION)}</p>",
        "<nav><h2 id='contents'>Contents</h2><ol>"
        + "".join(f"<li><a href='#{a}'>{html.escape(t)}</a></li>" for a, t in sections)
        + "</ol></nav>",
        "<h2 id='summary'>Survey summary</h2>",
    ]
    im = ingest.get("metrics", {})
    dm = stages.get("drift", {}).get("metrics", {})
    summary = [("survey", config.survey.name, ""), ("kind", kind, "")]
    if gravity:
        summary += [
            ("readings", im.get("readings"), ""),
            ("stations", dm.get("stations"), ""),
            ("loops", dm.get("loops", im.get("traverse_lines")), ""),
            ("base stations tied", dm.get("bases"), ""),
        ]
    elif kind == "observatory":
        summary += [
            ("readings (station minutes)", im.get("readings"), ""),
            ("stations", im.get("traverse_lines", 0) + im.get("tie_lines", 0), ""),
        ]
    else:
        summary += [
            ("readings", im.get("readings"), ""),
            ("lines", f"{im.get('traverse_lines')} traverse, {im.get('tie_lines')} tie", ""),
            ("line spacing", im.get("line_spacing_m"), "m"),
        ]

    def iso(text):  # "2025-03-03 21:40:00" -> "2025-03-03T21:40:00Z" (ISO 8601 UTC)
        return f"{str(text).replace(' ', 'T')}Z" if text and "T" not in str(text) else text

    summary += [
        ("first reading", iso(im.get("time_start")), "UTC"),
        ("last reading", iso(im.get("time_end")), "UTC"),
        ("output CRS", im.get("crs"), ""),
        ("spec checks", f"{len(checks)} run, {len(failed)} failed", ""),
        ("stages", ", ".join(f"{n} ({stages[n].get('status')})" for n in order), ""),
    ]
    parts.append(
        _table([{"quantity": q, "value": v, "unit": u} for q, v, u in summary], ["quantity", "value", "unit"])
    )

    parts.append("<h2 id='deliverables'>Deliverables</h2>")
    grid_rows = _grid_rows(manifest, grid_paths or {}, order, read_grid)
    parts.append(
        "<p>Links are relative to this report (the out/ folder)."
        + (
            " <a href='grids/products.nc'>grids/products.nc</a> holds the grids below in one NetCDF-CF file."
            if grid_rows
            else ""
        )
        + "</p>"
    )
    if grid_rows:
        parts.append("<h3>Grids (NetCDF-CF)</h3>")
        parts.append(
            _table(
                grid_rows,
                ["file_html", "quantity", "unit", "minimum", "maximum", "cells", "stage"],
                {
                    "file_html": "file",
                    "minimum": "minimum (unit)",
                    "maximum": "maximum (unit)",
                    "cells": "cells (easting x northing)",
                },
            )
        )
    residuals = residual_rows(table, kind)
    if residuals:
        parts.append("<h3>Residuals and corrections at the readings</h3>")
        parts.append(
            "<p>Every reading with every correction is in "
            "<a href='tables/readings.csv'>tables/readings.csv</a> (the residual table).</p>"
        )
        parts.append(
            _table(
                residuals,
                ["column", "meaning", "unit", "readings", "rms", "minimum", "maximum"],
                {"rms": "RMS (unit)", "minimum": "minimum (unit)", "maximum": "maximum (unit)"},
            )
        )
    parts.append("<h3>Tables (CSV)</h3>")
    table_rows = []
    for path in tables or []:
        words = TABLE_WORDS.get(path.stem, path.stem.replace("_", " "))
        table_rows.append(
            {
                "file_html": f"<a href='tables/{html.escape(path.name)}'>{html.escape(path.name)}</a>",
                "content": words,
            }
        )
    parts.append(_table(table_rows, ["file_html", "content"], {"file_html": "file"}))

    parts.append("<h2 id='failed-checks'>Failed spec checks</h2>")
    parts.append(_table(failed, CHECK_COLUMNS, CHECK_HEADERS) if failed else "<p>All spec checks passed.</p>")
    parts.append("<h2 id='tolerances'>Spec tolerances</h2>")
    parts.append("<p>Every tolerance of the spec profile in force, and whether this run checked it.</p>")
    parts.append(
        _table(
            _tolerance_rows(manifest.get("spec", {}), checks),
            ["tolerance", "value", "source", "status"],
            {"value": "value (unit in the name)"},
        )
    )

    for name in order:
        entry = stages[name]
        if name == "report":
            continue
        parts.append(f"<h2 id='stage-{name}'>{html.escape(titles.get(name, name))}</h2>")
        status = entry.get("status")
        if status != "done":
            parts.append(
                f"<p class='note'>Status: {html.escape(str(status))}. "
                f"{html.escape(entry.get('summary', ''))}</p>"
            )
            continue
        for note in entry.get("notes", []):
            parts.append(f"<p class='note'>{html.escape(str(note))}</p>")
        for warning in entry.get("warnings", []):
            parts.append(f"<p class='warning'>Warning: {html.escape(str(warning))}</p>")
        if entry.get("metrics"):
            parts.append(_metrics(entry["metrics"], kind))
        stage_checks = [c for c in checks if c.get("stage") == name]
        if stage_checks:
            parts.append("<h3>Spec checks</h3>" + _table(stage_checks, CHECK_COLUMNS, CHECK_HEADERS))
        for fig_title, path in figures.get(name, []):
            parts.append(_img(path, fig_title))
    parts.append("<h2 id='provenance'>Provenance</h2>")
    prov = [
        {"item": "potfield version", "value": manifest.get("potfield_version")},
        {"item": "configuration hash (SHA-256)", "value": manifest.get("config_hash")},
        {"item": "packages", "value": ", ".join(f"{k} {v}" for k, v in manifest.get("packages", {}).items())},
        {
            "item": "run times",
            "value": "stage timings and the run's date are in manifest.json "
            "(kept out of this page so the same inputs give the same page)",
        },
    ]
    parts.append(_table(prov, ["item", "value"]))
    parts.append("<h3>Inputs (SHA-256)</h3>")
    parts.append(
        _table(
            [{"file": k, "sha256": v} for k, v in sorted(manifest.get("inputs", {}).items())],
            ["file", "sha256"],
        )
    )
    if survey_toml is not None:
        parts.append("<h3>survey.toml used</h3>")
        parts.append(f"<pre>{html.escape(survey_toml)}</pre>")
    parts.append("<h2 id='cautions'>Cautions</h2>")
    parts.append(f"<p class='caution'>{html.escape(CAUTION)}</p>")
    parts.append(
        "<p>All numbers trace back to the raw readings through out/tables/readings.csv "
        "(source_file, source_row) and out/manifest.json.</p></body></html>"
    )
    return "\n".join(parts)


def build_report(
    survey, config, manifest: dict, table: pd.DataFrame | None, grid_paths: dict[str, Path]
) -> tuple[Path, int]:
    """Draw the maps and write out/report.html; returns (path, number of figures)."""
    read_grid = GridReader()
    figures = make_figures(survey, config, manifest, table, grid_paths, read_grid)
    checks = []

    for name in KIND_ORDER.get(config.kind, ()):
        for check in manifest.get("stages", {}).get(name, {}).get("checks", []):
            checks.append({**check, "stage": name})
    toml_path = survey.root / "survey.toml"
    survey_toml = toml_path.read_text(encoding="utf-8") if toml_path.is_file() else None
    tables = sorted(p for p in survey.tables.glob("*.csv"))
    text = render_html(config, manifest, figures, checks, grid_paths, survey_toml, tables, table, read_grid)
    write_text(survey.report_path, text)
    return survey.report_path, sum(len(v) for v in figures.values())


def rebuild_report(root: Path) -> Path:
    """``potfield report DIR``: rebuild maps and report.html from out/ without recomputing."""
    from ..errors import StageError
    from ..io.tables import manifest_layout, read_cache_columns
    from ..qc.specs import load_spec
    from ..survey import Survey

    survey = Survey(root)
    config = survey.load_config()
    if not survey.manifest_path.is_file():
        raise StageError(
            f"{survey.out}: no results to report on", fix=f"run 'potfield run {survey.root}' first"
        )
    manifest = json.loads(survey.manifest_path.read_text())
    manifest["spec"] = {k: list(v) for k, v in load_spec(config, survey).items()}
    # the readings table of the current stages, put together from their cache files by column
    layout = manifest_layout(survey.cache, manifest.get("stages", {}), KIND_ORDER[config.kind])
    if layout:
        from fnmatch import fnmatchcase

        wanted = [c for c in layout if any(fnmatchcase(c, p) for p in REPORT_READS)]
        table = read_cache_columns(layout, wanted)
    else:
        table = None
    grid_paths = {p.stem: p for p in survey.grids.glob("*.nc") if p.stem != "products"}
    with survey.lock():
        path, _ = build_report(survey, config, manifest, table, grid_paths)
        survey.refresh_manifest_outputs()  # the manifest's checksums follow the new report and maps
    return path
