"""clean stage: flag (never delete) spikes, time and distance gaps, duplicated timestamps and
heights outside the allowed band; report per-line noise as the fourth-difference envelope.

Flags are boolean ``flag_*`` columns; flagged readings stay in the table and later fits skip
them (:func:`potfield.stages.base.usable`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..fields.lines.noise import (
    cap_flags,
    first_difference_spikes,
    fourth_difference,
    line_noise,
    robust_spikes,
)
from .base import Check, Contract, Stage, StageContext, StageOutput

#: The measured value(s) cleaned per survey kind.
VALUE_COLUMNS = {
    "magnetic": ("total_field", "mag_north", "mag_east", "mag_down"),
    "gravity": (),  # station readings: no along-line spike test (a loop is not a profile)
    "observatory": ("mag_north", "mag_east", "mag_down", "total_field"),
}


def _gap_flags(values: np.ndarray, groups: np.ndarray, limit: float) -> tuple[np.ndarray, float]:
    """Flag the reading after a step larger than ``limit`` (0: 5 x the median step)."""
    step = np.full(values.size, np.nan)
    if values.size > 1:
        step[1:] = np.diff(values)
        step[1:][groups[1:] != groups[:-1]] = np.nan
    positive = step[np.isfinite(step) & (step > 0)]
    if limit <= 0:
        limit = 5.0 * float(np.median(positive)) if positive.size else np.inf
    return np.nan_to_num(step, nan=0.0) > limit, limit


def run(ctx: StageContext) -> StageOutput:
    cfg = ctx.config.clean
    table = ctx.table.copy(deep=False)  # copy-on-write: new columns only
    groups = pd.factorize(table["line"])[0]
    timed = "time" in table  # station lists may have no time: no time-based flags then
    seconds = (
        table["time"].to_numpy().astype("datetime64[ns]").astype(np.int64) / 1e9
        if timed
        else np.arange(len(table), dtype=float)
    )
    metrics: dict = {}
    checks: list[Check] = []
    notes: list[str] = []

    # Duplicated timestamps within a line (the second and later copies are flagged).
    key = pd.DataFrame({"g": groups, "t": seconds})
    table["flag_duplicate_time"] = key.duplicated(keep="first").to_numpy() if timed else False

    # Gaps in time and distance.
    if ctx.config.kind != "gravity" and timed:
        table["flag_time_gap"], time_limit = _gap_flags(seconds, groups, cfg.max_time_gap_s)
        metrics["time_gap_limit_s"] = time_limit
        if ctx.config.kind == "magnetic":
            table["flag_distance_gap"], dist_limit = _gap_flags(
                table["distance"].to_numpy(), groups, cfg.max_distance_gap_m
            )
            metrics["distance_gap_limit_m"] = dist_limit

    # Heights outside the band.
    if "height" in table and (cfg.height_min is not None or cfg.height_max is not None):
        h = table["height"].to_numpy()
        low = -np.inf if cfg.height_min is None else cfg.height_min
        high = np.inf if cfg.height_max is None else cfg.height_max
        table["flag_height"] = ~((h >= low) & (h <= high))

    # Spikes and fourth-difference noise on each measured value.
    noise_tables = []
    warnings: list[str] = []
    spike_any = np.zeros(len(table), dtype=bool)
    observatory = ctx.config.kind == "observatory"
    for name in VALUE_COLUMNS[ctx.config.kind]:
        if name not in table:
            continue
        values = table[name].to_numpy(dtype=float)
        raw = fourth_difference(values, groups)  # computed once: spikes, column and noise
        if observatory:  # one-minute variation data: first differences, floor of a few nT
            spikes, limit = first_difference_spikes(
                values, groups, cfg.spike_window, cfg.spike_threshold, cfg.observatory_spike_floor_nT
            )
            strength = np.abs(values - 0.5 * (np.roll(values, 1) + np.roll(values, -1))) / limit
        else:
            spikes, _, strength = robust_spikes(
                values,
                groups,
                cfg.spike_window,
                cfg.spike_threshold,
                cfg.spike_min,
                fourth=raw,
                return_strength=True,
            )
        found = int(spikes.sum())
        spikes, dropped = cap_flags(spikes, strength, cfg.max_spike_fraction)
        metrics[f"spikes_found_{name}"] = found
        if dropped:
            warnings.append(
                f"spike test on '{name}' flagged {found:,} of {len(table):,} readings "
                f"({found / max(len(table), 1):.1%}), more than [clean] max_spike_fraction = "
                f"{cfg.max_spike_fraction:g}: only the {found - dropped:,} strongest kept as spikes. "
                "Such a rate usually means the test is measuring the signal (check the sampling "
                "and [clean] spike_threshold)"
            )
        spike_any |= spikes
        d4n = raw / 16.0
        d4 = d4n if cfg.fourth_difference_normalised else raw
        column = "fourth_difference" if name == "total_field" else f"fourth_difference_{name}"
        table[column] = d4
        # The noise envelope excludes the spikes (they are reported as flags) and their neighbours.
        near_spike = np.convolve(spikes.astype(float), np.ones(5), mode="same") > 0
        envelope = line_noise(d4n, groups, usable=~near_spike)
        envelope.columns = [f"{c}_{name}" if name != "total_field" else c for c in envelope.columns]
        noise_tables.append(envelope)
    if VALUE_COLUMNS[ctx.config.kind]:
        table["flag_spike"] = spike_any

    flags = [c for c in table.columns if c.startswith("flag_")]
    counts = {c: int(table[c].sum()) for c in flags}
    metrics["flag_counts"] = counts
    metrics["flagged_readings"] = int(table[flags].any(axis=1).sum()) if flags else 0

    # Per-line table.
    lines = table.groupby(groups, sort=False).agg(
        line=("line", "first"),
        line_type=("line_type", "first"),
        readings=("line", "size"),
        **({"start": ("time", "first"), "end": ("time", "last")} if timed else {}),
    )
    for c in flags:
        lines[c.replace("flag_", "flagged_")] = table.groupby(groups, sort=False)[c].sum().to_numpy()
    for envelope in noise_tables:
        lines = lines.join(envelope)
    lines = lines.reset_index(drop=True)

    if "fourth_difference_p95" in lines:
        tol, source = ctx.tolerance("noise_fourth_difference_nT", 0.1)
        worst = float(np.nanmax(lines["fourth_difference_p95"])) if len(lines) else np.nan
        bad = lines.loc[lines["fourth_difference_p95"] > tol, "line"].tolist()
        checks.append(
            Check.at_most(
                "noise: 95th percentile of |fourth difference / 16| (worst line)",
                worst,
                tol,
                "nT",
                source,
                detail=f"{len(bad)} line(s) above tolerance"
                + (f": {', '.join(map(str, bad[:8]))}" if bad else ""),
            )
        )
        metrics["noise_p95_worst_nT"] = worst
    spike_frac = float(spike_any.mean()) if len(table) else 0.0
    tol, source = ctx.tolerance("max_flagged_fraction", 0.02)
    checks.append(
        Check.at_most(
            "fraction of readings flagged", metrics["flagged_readings"] / max(len(table), 1), tol, "", source
        )
    )
    notes.append(
        f"{metrics['flagged_readings']:,} of {len(table):,} readings flagged "
        f"({', '.join(f'{k[5:]}: {v}' for k, v in counts.items() if v) or 'none'}); "
        f"spikes {spike_frac:.3%}"
    )
    metrics["spike_fraction"] = spike_frac
    return StageOutput(
        table=table,
        metrics=metrics,
        tables={"clean_lines": lines},
        checks=checks,
        notes=notes,
        warnings=warnings,
    )


STAGE = Stage(
    name="clean",
    summary="flag spikes (fourth difference against the line's own roughness; first differences for "
    "observatory minutes), time/distance gaps, duplicate times and heights out of band; per-line "
    "fourth-difference noise",
    run=run,
    sections=("clean",),
    contract=Contract(
        requires_columns=("line", "line_type"),
        reads=(
            "line",
            "line_type",
            "time",
            "distance",
            "height",
            "total_field",
            "mag_north",
            "mag_east",
            "mag_down",
            "flag_*",
        ),
        provides_columns={"gravity": ("flag_duplicate_time",), "*": ("flag_duplicate_time", "flag_spike")},
        optional_columns=(
            "flag_time_gap",
            "flag_distance_gap",
            "flag_height",
            "fourth_difference",
            "fourth_difference_*",
        ),
        requires_state=("ingest",),
        provides_tables=("clean_lines",),
    ),
)
