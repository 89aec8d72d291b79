"""level stage: tie-line levelling of line surveys (glue; the maths is potfield.fields.lines.leveling).

Two-step levelling (Luyendyk 1997; ``[level] method = "two_step"``, the default): crossovers of
traverse lines with tie lines (and of tie lines with each other) are found, the tie lines are
levelled to each other with one constant each (mean tie correction zero: the survey keeps the
average level of its ties), then every traverse line is levelled to the adjusted ties with a
robust constant or low-order polynomial in time. ``method = "network"`` solves all lines at once
(Yarger, Robertson and Wentland 1978) with the same datum.

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
from .base import (ANOMALY_COLUMN, LEVELLED_COLUMN, Check, Contract, Stage, StageContext, StageOutput,
                   main_grid_names, usable, value_column)
from .microlevel import micro_level_table  # noqa: F401  (re-exported: the grid stage uses it)

def _value_column(ctx: StageContext, table: pd.DataFrame) -> str:
    """The reference stage's anomaly (:func:`potfield.stages.base.value_column`)."""
    column = value_column(table, ctx.config.kind, ctx.state, levelled=False)
    if column is None:
        raise StageError(
            f"the readings table has none of the columns {', '.join(main_grid_names(ctx.config.kind))} "
            "to level", key="level",
            fix="run the reference stage before level (potfield run SURVEY --from reference)",
        )
    return column


def _unit(config) -> str:
    return "mGal" if config.kind == "gravity" else "nT"


def _passthrough(table: pd.DataFrame, value: str, note: str, metrics=None) -> StageOutput:
    table = table.copy()
    table["level_correction"] = 0.0
    table[LEVELLED_COLUMN] = table[value].to_numpy(dtype=float)
    return StageOutput(table=table, notes=[note], metrics=dict(metrics or {}), skipped=note,
                       state={"value_column": LEVELLED_COLUMN, "levelled_column": value,
                              "levelled": False})


def _rms(values) -> float:
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    return float(np.sqrt(np.mean(values ** 2))) if values.size else float("nan")


def run(ctx: StageContext) -> StageOutput:
    """Level the lines of ``ctx.table``; see the module docstring."""
    if ctx.table is None:
        raise StageError("no readings table", key="level", fix="run the ingest stage first")
    cfg = ctx.config.level
    table = ctx.table
    value = _value_column(ctx, table)
    note_gravity = (" (gravity: anomaly_levelled holds the levelled bouguer_anomaly)"
                    if value == "bouguer_anomaly" else "")
    if not cfg.enabled:
        return _passthrough(table, value, "levelling disabled ([level] enabled = false): "
                            "anomaly_levelled = " + value + note_gravity)
    if "line" not in table.columns or "line_type" not in table.columns:
        return _passthrough(table, value, "no line column: nothing to level; anomaly_levelled = "
                            + value + note_gravity)
    is_tie = table["line_type"].astype(str).to_numpy() == "tie"
    if not is_tie.any() or is_tie.all():
        what = "no tie lines" if not is_tie.any() else "no traverse lines"
        return _passthrough(table, value, f"{what} (line_type): levelling skipped, zero "
                            f"correction; anomaly_levelled = {value}{note_gravity}",
                            {"crossovers": 0})

    ctx.progress("finding crossovers")
    lines = table["line"].astype(str).to_numpy()
    values = table[value].to_numpy(dtype=float)
    time = table["time"].to_numpy() if "time" in table.columns else None
    height = table["height"].to_numpy(dtype=float) if "height" in table.columns else None
    flagged = ~usable(table)
    crossovers = leveling.find_crossovers(
        table["easting"].to_numpy(float), table["northing"].to_numpy(float), lines, is_tie,
        values, time, height, flagged=flagged,
        max_segment_length=cfg.max_segment_m or None, tie_tie=True)
    huber = cfg.huber_threshold if cfg.huber_threshold > 0 else None
    tie_names = list(pd.unique(lines[is_tie]))
    traverse_names = list(pd.unique(lines[~is_tie]))
    if crossovers.empty:
        out = _passthrough(table, value, "no traverse line crosses a tie line: levelling skipped, "
                           "zero correction" + note_gravity, {"crossovers": 0})
        out.warnings.append("no crossovers found: check line_type and the tie-line settings in [lines]")
        out.tables["crossovers"] = crossovers
        return out

    ctx.progress(f"levelling {len(tie_names)} tie and {len(traverse_names)} traverse lines "
                 f"on {len(crossovers)} crossovers")
    if cfg.method == "network":
        ties, adjust = leveling.adjust_network(
            crossovers, model=cfg.traverse_model, lines=traverse_names, ties=tie_names,
            huber_threshold=huber, min_crossovers=cfg.min_crossovers,
            max_height_difference=cfg.max_height_difference_m)
    else:
        ties = leveling.adjust_ties(crossovers, tie_names, huber_threshold=huber,
                                    max_height_difference=cfg.max_height_difference_m)
        adjust = leveling.adjust_lines(crossovers, ties.corrections, model=cfg.traverse_model,
                                       lines=traverse_names, huber_threshold=huber,
                                       min_crossovers=cfg.min_crossovers,
                                       max_height_difference=cfg.max_height_difference_m)

    correction = adjust.evaluate(lines, time)
    correction[is_tie] = pd.Series(lines[is_tie]).map(ties.corrections).fillna(0.0).to_numpy()
    out = table.copy()
    out["level_correction"] = correction
    out["anomaly_levelled"] = values + correction

    # Crossover table with the misclosure after levelling.
    kind = crossovers["kind"].to_numpy()
    cx = crossovers.copy()
    corr_line = np.where(kind == "traverse-tie",
                         adjust.evaluate(cx["line"].to_numpy(), cx["time_line"].to_numpy()),
                         cx["line"].map(ties.corrections).fillna(0.0).to_numpy())
    corr_tie = cx["tie"].map(ties.corrections).fillna(0.0).to_numpy()
    cx["correction_line"] = corr_line
    cx["correction_tie"] = corr_tie
    cx["difference_levelled"] = cx["difference"].to_numpy() + corr_line - corr_tie
    used = leveling.usable_crossovers(crossovers, None, cfg.max_height_difference_m)
    cx["used"] = used
    cx["weight"] = np.where(kind == "traverse-tie", adjust.weights, ties.weights)

    rms_before = _rms(cx["difference"][used])
    rms_after = _rms(cx["difference_levelled"][used])
    unit = _unit(ctx.config)
    line_table = _line_table(out, cx, used, adjust, ties, traverse_names, tie_names,
                             cfg.min_crossovers)
    warnings = [f"line {row.line}: {row.warning}" for row in line_table.itertuples()
                if row.warning]
    if len(warnings) > 10:
        warnings = warnings[:10] + [f"... and {len(warnings) - 10} more (see tables/lines.csv)"]
    degraded = []
    if not used.any():
        warnings.insert(0, f"none of the {len(cx)} crossovers is usable (all flagged or above "
                        f"max_height_difference_m = {cfg.max_height_difference_m} m): lines "
                        "keep their level")
        degraded.append(warnings[0])
    elif len(adjust.unlevelled):
        names = ", ".join(map(str, list(adjust.unlevelled)[:10]))
        more = f" and {len(adjust.unlevelled) - 10} more" if len(adjust.unlevelled) > 10 else ""
        degraded.append(f"{len(adjust.unlevelled)} traverse line(s) left unlevelled (fewer than "
                        f"min_crossovers = {cfg.min_crossovers} usable crossovers): {names}{more}")
    if ctx.config.kind == "gravity":
        tol, source = ctx.tolerance("crossover_rms_mGal", 1.0, "common practice (from memory)")
    else:
        tol, source = ctx.tolerance("crossover_rms_nT", 1.0)
    checks = [Check.at_most("crossover RMS after levelling", rms_after, tol, unit, source,
                            f"{int(used.sum())} crossovers, {rms_before:.3g} {unit} before")]
    ratio = rms_before / rms_after if rms_after > 0 else float("inf")
    metrics = {
        "value_column": value,
        "crossovers": int(len(cx)),
        "crossovers_used": int(used.sum()),
        "crossover_rms_before": rms_before,
        "crossover_rms_after": rms_after,
        "crossover_rms_ratio": ratio,
        "traverse_model": cfg.traverse_model,
        "method": cfg.method,
        "unlevelled_lines": len(adjust.unlevelled),
    }
    notes = [f"levelled {value} on {int(used.sum())} of {len(cx)} crossovers: RMS misclosure "
             f"{rms_before:.3g} -> {rms_after:.3g} {unit} ({cfg.method.replace('_', '-')}, "
             f"{cfg.traverse_model} per traverse line; datum: mean tie correction 0)"
             f"{note_gravity}"]
    state = {
        "value_column": LEVELLED_COLUMN,
        "levelled_column": value,
        "levelled": True,
        "crossover_rms_before": rms_before,
        "crossover_rms_after": rms_after,
        "tie_corrections": {str(k): float(v) for k, v in ties.corrections.items()},
        "unlevelled_lines": list(adjust.unlevelled),
    }
    return StageOutput(table=out, metrics=metrics, state=state,
                       tables={"crossovers": cx, "lines": line_table}, checks=checks,
                       notes=notes, warnings=warnings, degraded=degraded)


def _line_table(table, cx, used, adjust, ties, traverse_names, tie_names, min_crossovers):
    stats = table.groupby(table["line"].astype(str), sort=False)["level_correction"].agg(
        ["mean", "min", "max"])
    rows = []
    both = pd.concat([
        pd.DataFrame({"line": cx["line"].astype(str), "before": cx["difference"],
                      "after": cx["difference_levelled"], "used": used}),
        pd.DataFrame({"line": cx["tie"].astype(str), "before": cx["difference"],
                      "after": cx["difference_levelled"], "used": used}),
    ])
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
                warning = (f"only {int(adjust.counts.get(name, 0))} usable crossover(s) "
                           f"(< min_crossovers = {min_crossovers}): level kept")
            elif deg < leveling.MODEL_DEGREE[adjust.model]:
                warning = f"too few crossovers for a {adjust.model} correction: degree {deg} used"
        elif ties.method.get(name, "none") == "none":
            warning = "no usable crossover: tie level kept"
        rows.append({
            "line": name,
            "type": kind,
            "crossovers": int(count.get(name, 0)),
            "correction_mean": float(stats["mean"].get(name, np.nan)),
            "correction_min": float(stats["min"].get(name, np.nan)),
            "correction_max": float(stats["max"].get(name, np.nan)),
            "crossover_rms_before": float(rms_before.get(name, np.nan)),
            "crossover_rms_after": float(rms_after.get(name, np.nan)),
            "warning": warning,
        })
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
        provides_tables=("crossovers", "lines"),
    ),
)
