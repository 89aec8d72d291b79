"""level stage: tie-line levelling of line surveys (glue; the maths is potfield.fields.lines.leveling).

Two-step levelling (Luyendyk 1997; ``[level] method = "two_step"``, the default): crossovers of
traverse lines with tie lines (and of tie lines with each other) are found, the tie lines are
levelled to each other with one constant each (mean tie correction zero: the survey keeps the
average level of its ties), then every traverse line is levelled to the adjusted ties with a
robust constant or low-order polynomial in time. ``method = "network"`` solves all lines at once
(Yarger, Robertson and Wentland 1978) with the same datum.

Adaptive defaults for real tie-line surveys (rough terrain, crossovers tens of metres apart in
height): crossovers are gated by their own height differences (``max_height_difference_m = 0``:
median |dh| + ``height_gate_mads`` robust sigma, Huber 1981); with ``height_correction`` the
lines are levelled twice, the second time on misclosures minus the height effect (vertical
gradient of a grid of the first-pass levelled data x height difference); with
``neighbour_levelling`` a traverse line with fewer than ``min_crossovers`` usable crossovers
takes the corrections of the lines flown before and after it (interpolated in time; Mauring et
al. 2002) and is listed in a warning. The crossovers table holds the misclosures before and
after, raw and height-corrected (:mod:`potfield.qc.level_plots` draws their histograms).

Adds ``level_correction`` (the value added; 0 where nothing was corrected) and ``anomaly_levelled``
(value + correction). The value levelled is ``anomaly`` (magnetic) or ``bouguer_anomaly``
(gravity); for uniformity the levelled result is called ``anomaly_levelled`` for both kinds.
Surveys without tie lines pass through with zero correction and a note.

The grid stage micro-levels with :func:`micro_level_table` when ``[level] micro_levelling`` is on.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import StageError
from ..fields.lines import leveling
from .base import (
    ANOMALY_COLUMN,
    LEVELLED_COLUMN,
    Check,
    Contract,
    Stage,
    StageContext,
    StageOutput,
    main_grid_names,
    usable,
    value_column,
)
from .microlevel import micro_level_table  # noqa: F401  (re-exported: the grid stage uses it)


def _value_column(ctx: StageContext, table: pd.DataFrame) -> str:
    """The reference stage's anomaly (:func:`potfield.stages.base.value_column`)."""
    column = value_column(table, ctx.config.kind, ctx.state, levelled=False)
    if column is None:
        raise StageError(
            f"the readings table has none of the columns {', '.join(main_grid_names(ctx.config.kind))} "
            "to level",
            key="level",
            fix="run the reference stage before level (potfield run SURVEY --from reference)",
        )
    return column


def _unit(config) -> str:
    return "mGal" if config.kind == "gravity" else "nT"


def _passthrough(table: pd.DataFrame, value: str, note: str, metrics=None) -> StageOutput:
    table = table.copy(deep=False)
    table["level_correction"] = 0.0
    table[LEVELLED_COLUMN] = table[value].to_numpy(dtype=float)
    return StageOutput(
        table=table,
        notes=[note],
        metrics=dict(metrics or {}),
        skipped=note,
        state={"value_column": LEVELLED_COLUMN, "levelled_column": value, "levelled": False},
    )


def _rms(values) -> float:
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(np.sqrt(np.mean(values**2))) if values.size else float("nan")


def run(ctx: StageContext) -> StageOutput:
    """Level the lines of ``ctx.table``; see the module docstring."""
    if ctx.table is None:
        raise StageError("no readings table", key="level", fix="run the ingest stage first")
    cfg = ctx.config.level
    table = ctx.table
    value = _value_column(ctx, table)
    note_gravity = (
        " (gravity: anomaly_levelled holds the levelled bouguer_anomaly)"
        if value == "bouguer_anomaly"
        else ""
    )
    if not cfg.enabled:
        return _passthrough(
            table,
            value,
            "levelling disabled ([level] enabled = false): anomaly_levelled = " + value + note_gravity,
        )
    if "line" not in table.columns or "line_type" not in table.columns:
        return _passthrough(
            table, value, "no line column: nothing to level; anomaly_levelled = " + value + note_gravity
        )
    is_tie = table["line_type"].astype(str).to_numpy() == "tie"
    if not is_tie.any() or is_tie.all():
        what = "no tie lines" if not is_tie.any() else "no traverse lines"
        return _passthrough(
            table,
            value,
            f"{what} (line_type): levelling skipped, zero "
            f"correction; anomaly_levelled = {value}{note_gravity}",
            {"crossovers": 0},
        )

    ctx.progress("finding crossovers")
    lines = table["line"].astype(str).to_numpy()
    values = table[value].to_numpy(dtype=float)
    time = table["time"].to_numpy() if "time" in table.columns else None
    height = table["height"].to_numpy(dtype=float) if "height" in table.columns else None
    flagged = ~usable(table)
    crossovers = leveling.find_crossovers(
        table["easting"].to_numpy(float),
        table["northing"].to_numpy(float),
        lines,
        is_tie,
        values,
        time,
        height,
        flagged=flagged,
        max_segment_length=cfg.max_segment_m or None,
        tie_tie=True,
    )
    huber = cfg.huber_threshold if cfg.huber_threshold > 0 else None
    tie_names = list(pd.unique(lines[is_tie]))
    traverse_names = list(pd.unique(lines[~is_tie]))
    if crossovers.empty:
        out = _passthrough(
            table,
            value,
            "no traverse line crosses a tie line: levelling skipped, zero correction" + note_gravity,
            {"crossovers": 0},
        )
        out.warnings.append("no crossovers found: check line_type and the tie-line settings in [lines]")
        out.tables["crossovers"] = crossovers
        return out

    # Height gate: fixed, or from the crossovers' own height differences (robust).
    candidates = leveling.usable_crossovers(crossovers)
    if cfg.max_height_difference_m > 0:
        gate, gate_text = float(cfg.max_height_difference_m), "fixed"
    else:
        gate = leveling.height_gate(
            crossovers["height_difference"].to_numpy(float)[candidates], cfg.height_gate_mads
        )
        gate_text = f"adaptive: median |dh| + {cfg.height_gate_mads:g} robust sigma"
    gate_arg = gate if np.isfinite(gate) else None

    def solve(cx):
        if cfg.method == "network":
            return leveling.adjust_network(
                cx,
                model=cfg.traverse_model,
                lines=traverse_names,
                ties=tie_names,
                huber_threshold=huber,
                min_crossovers=cfg.min_crossovers,
                max_height_difference=gate_arg,
            )
        t = leveling.adjust_ties(cx, tie_names, huber_threshold=huber, max_height_difference=gate_arg)
        a = leveling.adjust_lines(
            cx,
            t.corrections,
            model=cfg.traverse_model,
            lines=traverse_names,
            huber_threshold=huber,
            min_crossovers=cfg.min_crossovers,
            max_height_difference=gate_arg,
        )
        return t, a

    def corrections(ties, adjust):
        corr = adjust.evaluate(lines, time)
        corr[is_tie] = pd.Series(lines[is_tie]).map(ties.corrections).fillna(0.0).to_numpy()
        return corr

    ctx.progress(
        f"levelling {len(tie_names)} tie and {len(traverse_names)} traverse lines "
        f"on {len(crossovers)} crossovers"
    )
    ties, adjust = solve(crossovers)
    gradient = np.full(len(crossovers), np.nan)
    solved = crossovers
    spacing = _traverse_spacing(ctx, crossovers)
    if cfg.height_correction and height is not None and np.isfinite(height).any() and spacing:
        # Two passes: the gradient comes from a grid of the first-pass levelled values (fewer
        # line-level residuals in it), then the height-corrected misclosures are levelled.
        ctx.progress("estimating the vertical gradient at the crossovers")
        first = values + corrections(ties, adjust)
        ok = ~flagged
        gradient = leveling.vertical_gradient_at(
            table["easting"].to_numpy(float)[ok],
            table["northing"].to_numpy(float)[ok],
            first[ok],
            crossovers["easting"].to_numpy(float),
            crossovers["northing"].to_numpy(float),
            0.5 * spacing,
        )
        solved = crossovers.copy()
        solved["difference"] = leveling.height_corrected_differences(crossovers, gradient)
        ties, adjust = solve(solved)
    height_corrected = bool(np.isfinite(gradient).any())

    correction = corrections(ties, adjust)
    # Chained levelling: lines without enough crossovers from the lines flown around them.
    neighbour_lines = []
    if cfg.neighbour_levelling and adjust.unlevelled:
        target = np.isin(lines, adjust.unlevelled) & ~is_tie
        source = ~is_tie & ~np.isin(lines, adjust.unlevelled)
        filled = leveling.neighbour_corrections(lines, time, correction, source, target)
        take = target & np.isfinite(filled)
        correction[take] = filled[take]
        neighbour_lines = [n for n in adjust.unlevelled if (take & (lines == n)).any()]
    out = table.copy(deep=False)
    out["level_correction"] = correction
    out["anomaly_levelled"] = values + correction

    # Crossover table with the misclosure after levelling (raw and height-corrected).
    kind = crossovers["kind"].to_numpy()
    cx = crossovers.copy()
    by_reading = np.where(
        np.isin(cx["line"].astype(str), neighbour_lines), _at_crossing(correction, cx), np.nan
    )
    corr_line = np.where(
        kind == "traverse-tie",
        adjust.evaluate(cx["line"].to_numpy(), cx["time_line"].to_numpy()),
        cx["line"].map(ties.corrections).fillna(0.0).to_numpy(),
    )
    corr_line = np.where(np.isfinite(by_reading), by_reading, corr_line)
    corr_tie = cx["tie"].map(ties.corrections).fillna(0.0).to_numpy()
    cx["correction_line"] = corr_line
    cx["correction_tie"] = corr_tie
    cx["difference_levelled"] = cx["difference"].to_numpy() + corr_line - corr_tie
    cx["gradient_up"] = gradient
    cx["height_effect"] = np.where(
        np.isfinite(gradient), gradient * cx["height_difference"].to_numpy(float), 0.0
    )
    cx["difference_height_corrected"] = cx["difference"] - cx["height_effect"]
    cx["difference_levelled_height_corrected"] = cx["difference_levelled"] - cx["height_effect"]
    used = leveling.usable_crossovers(crossovers, None, gate_arg)
    cx["used"] = used
    cx["weight"] = np.where(kind == "traverse-tie", adjust.weights, ties.weights)

    rms_before_raw = _rms(cx["difference"][used])
    rms_after_raw = _rms(cx["difference_levelled"][used])
    if height_corrected:
        rms_before = _rms(cx["difference_height_corrected"][used])
        rms_after = _rms(cx["difference_levelled_height_corrected"][used])
    else:
        rms_before, rms_after = rms_before_raw, rms_after_raw
    unit = _unit(ctx.config)
    line_table = _line_table(
        out, cx, used, adjust, ties, traverse_names, tie_names, cfg.min_crossovers, neighbour_lines
    )
    warnings = [f"line {row.line}: {row.warning}" for row in line_table.itertuples() if row.warning]
    if len(warnings) > 10:
        warnings = warnings[:10] + [f"... and {len(warnings) - 10} more (see tables/lines.csv)"]
    degraded = []
    if adjust.unlevelled:
        kept = [n for n in adjust.unlevelled if n not in neighbour_lines]
        text = (
            f"{len(adjust.unlevelled)} traverse line(s) with fewer than min_crossovers = "
            f"{cfg.min_crossovers} usable crossovers: {', '.join(adjust.unlevelled)}"
        )
        if neighbour_lines:
            text += f"; levelled from the lines flown before and after: {', '.join(neighbour_lines)}"
        if kept:
            text += f"; level kept: {', '.join(kept)}"
        warnings.insert(0, text)
        if kept:
            degraded.append(
                f"{len(kept)} traverse line(s) left unlevelled (fewer than "
                f"min_crossovers = {cfg.min_crossovers} usable crossovers): {', '.join(kept[:10])}"
                + (f" and {len(kept) - 10} more" if len(kept) > 10 else "")
            )
    if not used.any():
        warnings.insert(
            0,
            f"none of the {len(cx)} crossovers is usable (all flagged or above "
            f"the height gate of {gate:.3g} m): lines keep their level",
        )
        degraded.append(warnings[0])
    if ctx.config.kind == "gravity":
        tol, source = ctx.tolerance("crossover_rms_mGal", 1.0, "common practice (from memory)")
    else:
        tol, source = ctx.tolerance("crossover_rms_nT", 1.0)
    checks = [
        Check.at_most(
            "crossover RMS after levelling",
            rms_after,
            tol,
            unit,
            source,
            f"{int(used.sum())} crossovers, {rms_before:.3g} {unit} before",
        )
    ]
    ratio = rms_before / rms_after if rms_after > 0 else float("inf")
    metrics = {
        "value_column": value,
        "crossovers": int(len(cx)),
        "crossovers_used": int(used.sum()),
        "crossover_rms_before": rms_before,
        "crossover_rms_after": rms_after,
        "crossover_rms_ratio": ratio,
        "crossover_rms_before_raw": rms_before_raw,
        "crossover_rms_after_raw": rms_after_raw,
        "height_gate_m": gate if np.isfinite(gate) else None,
        "height_gate": gate_text,
        "height_corrected": height_corrected,
        "traverse_model": cfg.traverse_model,
        "method": cfg.method,
        "unlevelled_lines": len(adjust.unlevelled) - len(neighbour_lines),
        "neighbour_levelled_lines": len(neighbour_lines),
    }
    what = "height-corrected RMS misclosure" if height_corrected else "RMS misclosure"
    notes = [
        (
            f"levelled {value} on {int(used.sum())} of {len(cx)} crossovers: {what} "
            f"{rms_before:.3g} -> {rms_after:.3g} {unit} ({ratio:.3g}x; "
            f"{cfg.method.replace('_', '-')}, {cfg.traverse_model} per traverse line; datum: "
            f"mean tie correction 0){note_gravity}"
        ),
        f"height gate {gate:.3g} m ({gate_text})",
    ]
    if height_corrected:
        notes.append(
            f"misclosures corrected for height differences with the vertical gradient "
            f"of the data (median |dh| "
            f"{float(np.nanmedian(np.abs(cx['height_difference'][used]))):.3g} m); raw "
            f"RMS misclosure {rms_before_raw:.3g} -> {rms_after_raw:.3g} {unit}"
        )
    state = {
        "value_column": LEVELLED_COLUMN,
        "levelled_column": value,
        "levelled": True,
        "crossover_rms_before": rms_before,
        "crossover_rms_after": rms_after,
        "height_gate_m": gate if np.isfinite(gate) else None,
        "tie_corrections": {str(k): float(v) for k, v in ties.corrections.items()},
        "unlevelled_lines": [n for n in adjust.unlevelled if n not in neighbour_lines],
        "neighbour_levelled_lines": neighbour_lines,
    }
    return StageOutput(
        table=out,
        metrics=metrics,
        state=state,
        tables={"crossovers": cx, "lines": line_table},
        checks=checks,
        notes=notes,
        warnings=warnings,
        degraded=degraded,
    )


def _at_crossing(correction, cx):
    """Per-reading correction interpolated at each crossover on its line."""
    i = cx["index_line"].to_numpy(np.int64)
    f = cx["fraction_line"].to_numpy(float)
    nxt = np.minimum(i + 1, correction.size - 1)
    return correction[i] + f * (correction[nxt] - correction[i])


def _traverse_spacing(ctx, crossovers):
    """Traverse-line spacing (m): from ingest, else the median distance between consecutive
    crossovers along the tie lines."""
    spacing = ctx.state.get("ingest", {}).get("line_spacing_m")
    if spacing and np.isfinite(spacing) and spacing > 0:
        return float(spacing)
    cx = crossovers[crossovers["kind"] == "traverse-tie"]
    if len(cx) < 3:
        return None
    gaps = []
    for _, group in cx.groupby("tie"):  # loop over tie lines
        e, n = group["easting"].to_numpy(), group["northing"].to_numpy()
        order = np.argsort(group["index_tie"].to_numpy() + group["fraction_tie"].to_numpy())
        gaps.append(np.hypot(np.diff(e[order]), np.diff(n[order])))
    gaps = np.concatenate(gaps) if gaps else np.zeros(0)
    gaps = gaps[gaps > 0]
    return float(np.median(gaps)) if gaps.size else None


def _line_table(table, cx, used, adjust, ties, traverse_names, tie_names, min_crossovers, neighbour_lines=()):
    stats = table.groupby(table["line"].astype(str), sort=False)["level_correction"].agg(
        ["mean", "min", "max"]
    )
    rows = []
    both = pd.concat(
        [
            pd.DataFrame(
                {
                    "line": cx["line"].astype(str),
                    "before": cx["difference"],
                    "after": cx["difference_levelled"],
                    "used": used,
                }
            ),
            pd.DataFrame(
                {
                    "line": cx["tie"].astype(str),
                    "before": cx["difference"],
                    "after": cx["difference_levelled"],
                    "used": used,
                }
            ),
        ]
    )
    both = both[both["used"]]
    per_line = both.groupby("line")
    rms_before = per_line["before"].apply(_rms)
    rms_after = per_line["after"].apply(_rms)
    count = per_line.size()
    for name, kind in [(n, "traverse") for n in traverse_names] + [(n, "tie") for n in tie_names]:
        warning = ""
        if kind == "traverse":
            deg = int(adjust.degree.get(name, -1))
            if name in adjust.unlevelled:
                warning = (
                    f"only {int(adjust.counts.get(name, 0))} usable crossover(s) "
                    f"(< min_crossovers = {min_crossovers}): "
                    + (
                        "levelled from the lines flown before and after"
                        if name in neighbour_lines
                        else "level kept"
                    )
                )
            elif deg < leveling.MODEL_DEGREE[adjust.model]:
                warning = f"too few crossovers for a {adjust.model} correction: degree {deg} used"
        elif ties.method.get(name, "none") == "none":
            warning = "no usable crossover: tie level kept"
        rows.append(
            {
                "line": name,
                "type": kind,
                "crossovers": int(count.get(name, 0)),
                "correction_mean": float(stats["mean"].get(name, np.nan)),
                "correction_min": float(stats["min"].get(name, np.nan)),
                "correction_max": float(stats["max"].get(name, np.nan)),
                "crossover_rms_before": float(rms_before.get(name, np.nan)),
                "crossover_rms_after": float(rms_after.get(name, np.nan)),
                "warning": warning,
            }
        )
    return pd.DataFrame(rows)


STAGE = Stage(
    name="level",
    summary="tie-line levelling: crossovers, ties to each other, traverse lines to ties (robust)",
    run=run,
    sections=("level", "lines"),
    inputs=None,
    kinds=("magnetic", "gravity"),
    contract=Contract(
        requires_columns={k: ("easting", "northing", c) for k, c in ANOMALY_COLUMN.items()},
        provides_columns=("level_correction", LEVELLED_COLUMN),
        reads=(
            "easting",
            "northing",
            "height",
            "time",
            "line",
            "line_type",
            "flag_*",
            *ANOMALY_COLUMN.values(),
        ),
        provides_tables=("crossovers", "lines"),
    ),
)
