"""diurnal stage: remove the time-varying external field recorded at base magnetometers.

Reads the base records listed under ``[[diurnal.bases]]`` (delimited text mapped like the survey
files, or IAGA-2002), removes their spikes, interpolates them to the readings' times, subtracts
the datum and combines several bases. Adds ``diurnal`` (nT removed: ``total_field - diurnal`` is
the corrected field) and ``flag_base_gap``. The physics is in :mod:`potfield.fields.magnetic.diurnal`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..config import unit_factor
from ..errors import ConfigError, InputDataError
from ..fields.errors import FieldError
from ..fields.magnetic.diurnal import (
    base_datum,
    base_sessions,
    chord_deviation,
    clean_base,
    combine_bases,
    estimate_time_offset,
    great_circle_distance,
    interpolate_base,
    session_datums,
    setup_transients,
    station_difference,
)
from ..io.baselog import read_delimited_base
from ..io.iaga2002 import looks_like_iaga2002, read_iaga2002
from .base import Check, Contract, Stage, StageContext, StageOutput, usable

#: Most rows of the ``base_record`` table (all bases together), for plots.
BASE_RECORD_ROWS = 20_000
#: Smallest correlation for which a time-offset estimate is reported as a check.
MIN_OFFSET_CORRELATION = 0.5


@dataclass
class BaseRecord:
    """One base station's record as read (times sorted, UTC)."""

    name: str
    path: object
    time: np.ndarray
    value: np.ndarray
    longitude: float | None
    latitude: float | None
    key: str
    rejected: int = 0


def _time_text(t) -> str:
    return str(pd.Timestamp(t).floor("s")).replace(" ", "T")


def _span_text(start, end) -> str:
    return f"{_time_text(start)} to {_time_text(end)}"


def read_base(base, survey, index: int, quality=(None, ()), encoding: str = "utf-8") -> BaseRecord:
    """Read one ``[[diurnal.bases]]`` entry into times (datetime64[ns], UTC) and total field (nT).

    Delimited files go through the same reader, time formats and units as the survey files
    (:mod:`potfield.io.delimited`); IAGA-2002 files give F (or, without a scalar F, the vector
    intensity) and, unless the config sets them, the base position from their header. The
    base's ``time_offset_s`` is added to its times. ``quality`` = ([diurnal]
    base_quality_column, base_quality_accepted) for delimited files (:mod:`potfield.io.baselog`).
    """
    key = f"diurnal.bases[{index}]"
    path = survey.resolve(base.file)
    if not path.is_file():
        raise InputDataError(
            "base station file not found",
            file=path,
            key=f"{key}.file",
            fix="check the file name under [[diurnal.bases]]",
        )
    fmt = base.format
    if fmt == "auto":
        fmt = "iaga2002" if looks_like_iaga2002(path) else "delimited"
    lon, lat = base.longitude, base.latitude
    rejected = 0
    if fmt == "iaga2002":
        record = read_iaga2002(path)
        times = record.data["time"].to_numpy(dtype="datetime64[ns]")
        value = record.data["total_field"].to_numpy(dtype=float)
        if not np.isfinite(value).any():
            # no scalar F: the vector intensity carries the same external variation
            value = np.sqrt(
                record.data["mag_north"] ** 2 + record.data["mag_east"] ** 2 + record.data["mag_down"] ** 2
            ).to_numpy(dtype=float)
        if lon is None and np.isfinite(record.header.get("longitude", np.nan)):
            lon = ((float(record.header["longitude"]) + 180.0) % 360.0) - 180.0
        if lat is None and np.isfinite(record.header.get("latitude", np.nan)):
            lat = float(record.header["latitude"])
    else:
        times, value, rejected = read_delimited_base(
            path, base, key, *quality, encoding=encoding, factor=unit_factor("total_field", base.units)
        )
    if base.time_offset_s:
        times = times + np.timedelta64(int(round(base.time_offset_s * 1e9)), "ns")
    order = np.argsort(times, kind="stable")
    times, value = times[order], np.asarray(value, dtype=float)[order]
    if times.size == 0 or not np.isfinite(value).any():
        raise InputDataError(
            "base record has no usable total-field value",
            file=path,
            fix="check the file and its column mapping",
        )
    return BaseRecord(base.name, path, times, value, lon, lat, key, rejected)


def _datums(ctx, bases, cleaned, span) -> list[float]:
    """Datum of each base: the first by the configured mode, the others tied by level."""
    cfg = ctx.config.diurnal
    good = [(b.time[c.good], b.value[c.good]) for b, c in zip(bases, cleaned)]
    medians = [base_datum(t, v, "median", span=span) for t, v in good]
    t0, v0 = good[0]
    if cfg.datum == "median":
        first = medians[0]
    elif cfg.datum == "value":
        if cfg.datum_value is None:
            raise ConfigError(
                "datum = 'value' needs datum_value (nT)",
                key="diurnal.datum_value",
                fix="set datum_value under [diurnal] or use datum = 'median'",
            )
        first = float(cfg.datum_value)
    else:
        if not cfg.datum_time:
            raise ConfigError(
                "datum = 'time' needs datum_time",
                key="diurnal.datum_time",
                fix='set datum_time = "YYYY-MM-DDThh:mm:ssZ" under [diurnal]',
            )
        try:
            stamp = pd.Timestamp(cfg.datum_time)
        except (ValueError, TypeError):
            raise ConfigError(
                f"cannot read datum_time '{cfg.datum_time}'",
                key="diurnal.datum_time",
                fix="use ISO 8601, e.g. 2024-05-01T10:00:00Z",
            ) from None
        if stamp.tzinfo is not None:
            stamp = stamp.tz_convert("UTC").tz_localize(None)
        try:
            first = base_datum(t0, v0, "time", at_time=np.datetime64(stamp.to_datetime64(), "ns"))
        except FieldError:
            raise ConfigError(
                f"datum_time {cfg.datum_time} is outside the record of base "
                f"'{bases[0].name}' ({_span_text(t0[0], t0[-1])})",
                key="diurnal.datum_time",
                fix="choose a time inside the base record",
            ) from None
    return [first + (m - medians[0]) for m in medians]


def _base_record_table(bases, cleaned) -> pd.DataFrame:
    """Each cleaned base record in at most BASE_RECORD_ROWS / n bins (mean, min, max)."""
    limit = max(BASE_RECORD_ROWS // len(bases), 1)
    parts = []
    for b, c in zip(bases, cleaned):
        n = b.time.size
        size = int(np.ceil(n / limit))
        bins = np.arange(n) // size
        clean = np.where(c.good, b.value, np.nan)
        frame = pd.DataFrame(
            {"bin": bins, "time": b.time, "total_field": clean, "spike": c.spike, "missing": c.missing}
        )
        grouped = frame.groupby("bin")
        part = pd.DataFrame(
            {
                "base": b.name,
                "time": grouped["time"].first().to_numpy(),
                "total_field": grouped["total_field"].mean().to_numpy(),
                "total_field_min": grouped["total_field"].min().to_numpy(),
                "total_field_max": grouped["total_field"].max().to_numpy(),
                "samples": grouped["time"].size().to_numpy(),
                "spikes": grouped["spike"].sum().to_numpy(),
                "missing": grouped["missing"].sum().to_numpy(),
            }
        )
        parts.append(part)
    return pd.concat(parts, ignore_index=True)


def run(ctx: StageContext) -> StageOutput:
    """Apply the diurnal correction of ``[diurnal]`` to the readings.

    Parameters
    ----------
    ctx : StageContext
        ``ctx.table`` with ``time``, ``longitude``, ``latitude`` (and ``total_field`` for the
        time-offset estimate).

    Returns
    -------
    StageOutput
        The table with ``diurnal`` (nT; ``total_field - diurnal`` is corrected) and
        ``flag_base_gap``; tables ``diurnal_lines`` and ``base_record``; checks of the chord
        deviation (15 s, 60 s), the clock offset and the difference between bases.

    Notes
    -----
    Method: base record cleaned (Hampel identifier; Hampel 1974, J. Am. Stat. Assoc. 69:383),
    interpolated to the readings, minus a datum, combined over bases by nearest or
    inverse-distance weights (Shepard 1968); the correction itself as in Reford (1980),
    Geophysics 45:1640. See :mod:`potfield.fields.magnetic.diurnal`.
    """
    cfg = ctx.config.diurnal
    if not cfg.enabled:
        why = "diurnal correction disabled ([diurnal] enabled = false)"
        return StageOutput(notes=[why], skipped=why)
    if "time" not in ctx.table.columns or ctx.table["time"].isna().all():
        why = (
            "the readings have no time (no [input.columns] time): no diurnal correction; "
            "the external field variation stays in the anomaly"
        )
        return StageOutput(notes=[why], skipped=why)
    if not cfg.bases:
        if cfg.remote_reference:
            return _remote_reference(ctx)
        why = "no base station given: diurnal correction not applied"
        return StageOutput(notes=[why], skipped=why)
    table = ctx.table.copy(deep=False)  # copy-on-write: new columns only
    reading_time = table["time"].to_numpy(dtype="datetime64[ns]")
    span = (reading_time.min(), reading_time.max())
    notes: list[str] = []
    warnings: list[str] = []
    degraded: list[str] = []
    checks: list[Check] = []
    metrics: dict = {"bases": len(cfg.bases)}

    names = [b.name for b in cfg.bases]
    for i, name in enumerate(names):
        if name in names[:i]:
            raise ConfigError(
                f"base name '{name}' is used twice",
                key=f"diurnal.bases[{i}].name",
                fix="give every [[diurnal.bases]] its own name",
            )
    quality = (cfg.base_quality_column, cfg.base_quality_accepted)
    bases = [read_base(b, ctx.survey, i, quality, ctx.config.input.encoding) for i, b in enumerate(cfg.bases)]
    for b in bases:
        if b.time[-1] < span[0] or b.time[0] > span[1]:
            raise InputDataError(
                f"base record of '{b.name}' ({_span_text(b.time[0], b.time[-1])}) does not overlap "
                f"the survey readings ({_span_text(*span)})",
                file=b.path,
                fix="check the base file, its time format/date and time_offset_s (UTC clocks)",
            )
    ctx.progress(f"cleaning {len(bases)} base record(s)")
    cleaned = [
        clean_base(
            b.time,
            b.value,
            window=cfg.spike_window,
            threshold=cfg.spike_threshold,
            min_spike=cfg.spike_min_nT,
            max_gap_s=cfg.max_gap_s,
        )
        for b in bases
    ]
    # sessions (gaps, datum jumps) and set-up transients; one datum per session
    sessions = []
    for b, c in zip(bases, cleaned):
        split = base_sessions(b.time, b.value, c.good, gap_s=cfg.session_gap_s, jump_nT=cfg.base_jump_nT)
        if cfg.settle_s > 0:
            c.transient = setup_transients(
                b.time, b.value, split.session, c.good, settle_s=cfg.settle_s, min_nT=cfg.spike_min_nT
            )
            if c.transient.any():  # levels across gaps measured without the settling minutes
                c.good = c.good & ~c.transient
                split = base_sessions(
                    b.time, b.value, c.good, gap_s=cfg.session_gap_s, jump_nT=cfg.base_jump_nT
                )
        else:
            c.transient = np.zeros(b.time.size, dtype=bool)
        if not c.good.any():
            raise InputDataError(
                "base record has no usable sample after cleaning",
                file=b.path,
                fix="check the base file; raise [diurnal] spike_min_nT or set settle_s = 0",
            )
        sessions.append(split)
    datums = _datums(ctx, bases, cleaned, span)
    levelled_values = []  # each base minus its sessions' datums (nT)
    session_levels = []
    for b, c, d, split in zip(bases, cleaned, datums, sessions):
        whole = base_datum(b.time[c.good], b.value[c.good], "median", span=span)
        per_session = session_datums(b.time, b.value, split.session, c.good, span) + (d - whole)
        session_levels.append(per_session)
        levelled_values.append(b.value - per_session[split.session])

    corrections, flags = [], []
    for b, c, d, split, levelled, per_session in zip(
        bases, cleaned, datums, sessions, levelled_values, session_levels
    ):
        values, flag = interpolate_base(
            b.time[c.good], levelled[c.good], reading_time, cfg.interpolation, cfg.max_gap_s
        )
        corrections.append(values)
        flags.append(flag)
        outside = int(((reading_time < b.time[c.good][0]) | (reading_time > b.time[c.good][-1])).sum())
        if outside:
            warnings.append(
                f"{outside:,} readings lie outside the record of base '{b.name}' "
                f"({_span_text(b.time[0], b.time[-1])})"
            )
            degraded.append(warnings[-1])
        metrics[f"base_{b.name}"] = {
            "samples": int(b.time.size),
            "spikes": int(c.spike.sum()),
            "missing": int(c.missing.sum()),
            "gaps": int(len(c.gaps)),
            "datum_nT": float(d),
            "start": str(b.time[0]),
            "end": str(b.time[-1]),
            "sessions": int(per_session.size),
            "session_datums_nT": [float(x) for x in per_session],
            "transient_samples": int(c.transient.sum()),
            "jumps": [
                {
                    "time": _time_text(b.time[j["index"]]),
                    "kind": j["kind"],
                    "size_nT": round(float(j["size_nT"]), 2),
                }
                for j in split.jumps
            ],
            "quality_rejected": b.rejected,
        }
        for j in split.jumps:
            where = "across a recording gap" if j["kind"] == "gap" else "inside the record"
            warnings.append(
                f"degraded: base '{b.name}' level jumps by {j['size_nT']:+.1f} nT at "
                f"{_time_text(b.time[j['index']])} ({where}; more than [diurnal] base_jump_nT = "
                f"{cfg.base_jump_nT:g} nT): a relocation or new set-up? Each of its {per_session.size} "
                "sessions is levelled to its own datum; check the base log and the tie-line misclosures"
            )
        if per_session.size > 1:
            notes.append(
                f"base '{b.name}': {per_session.size} sessions (gaps over "
                f"{cfg.session_gap_s:g} s or datum jumps), each levelled to its own datum "
                f"({', '.join(f'{x:.1f}' for x in per_session)} nT)"
            )
        if c.transient.any():
            notes.append(
                f"base '{b.name}': {int(c.transient.sum())} samples of set-up transient "
                f"at session starts left out"
            )
    if any(split.jumps for split in sessions):
        notes.append(
            "degraded: base datum jumps found (see warnings); the diurnal correction levels "
            "each base session to its own datum"
        )

    distances = None  # (n_bases, n_readings) m, when every base has a position
    if all(b.longitude is not None and b.latitude is not None for b in bases):
        lon, lat = table["longitude"].to_numpy(float), table["latitude"].to_numpy(float)
        distances = np.stack([great_circle_distance(b.longitude, b.latitude, lon, lat) for b in bases])
    if len(bases) == 1:
        diurnal, gap = corrections[0], flags[0]
    else:
        if distances is None:
            missing = next(b for b in bases if b.longitude is None or b.latitude is None)
            raise ConfigError(
                f"base '{missing.name}' has no position; two or more bases are combined by distance",
                key=f"{missing.key}.longitude",
                fix="set longitude and latitude of every base under [[diurnal.bases]]",
            )
        diurnal, gap, weights = combine_bases(
            np.stack(corrections), np.stack(flags), distances, cfg.combine, cfg.distance_power
        )
        for b, w in zip(bases, weights):
            metrics[f"base_{b.name}"]["mean_weight"] = float(w.mean())
    table["diurnal"] = diurnal
    table["flag_base_gap"] = gap

    # --- checks --------------------------------------------------------------------------------
    tol15, src15 = ctx.tolerance("diurnal_chord_15s_nT", 0.5)
    tol60, src60 = ctx.tolerance("diurnal_chord_60s_nT", 3.0)
    margin = np.timedelta64(60, "s")
    for b, c, levelled in zip(bases, cleaned, levelled_values):
        inside = c.good & (b.time >= span[0] - margin) & (b.time <= span[1] + margin)
        for window, tol, src in ((15.0, tol15, src15), (60.0, tol60, src60)):
            chord = chord_deviation(b.time[inside], levelled[inside], window)
            if np.isfinite(chord.max):
                worst = b.time[inside][0] + np.timedelta64(int(round(chord.start * 1e9)), "ns")
                checks.append(
                    Check.at_most(
                        f"diurnal chord {window:g} s ({b.name})",
                        chord.max,
                        tol,
                        "nT",
                        src,
                        detail=f"largest deviation from a {window:g} s chord, window starting "
                        f"{_time_text(worst)}",
                    )
                )
    offset_tol, offset_src = ctx.tolerance("diurnal_time_offset_s", 1.0, "project default")
    if distances is not None and "total_field" in table:
        fit = usable(table) & np.isfinite(table["total_field"].to_numpy(float))
        for b, c, dist, levelled in zip(bases, cleaned, distances, levelled_values):
            near = fit & (dist <= cfg.offset_radius_m)
            if near.sum() < 30:
                notes.append(
                    f"time offset to base '{b.name}' not estimated: {int(near.sum())} usable "
                    f"readings within {cfg.offset_radius_m:g} m of it"
                )
                continue
            order = np.argsort(reading_time[near], kind="stable")
            result = estimate_time_offset(
                b.time[c.good],
                levelled[c.good],
                reading_time[near][order],
                table["total_field"].to_numpy(float)[near][order],
                highpass_s=cfg.offset_highpass_s,
                max_lag_s=cfg.offset_max_lag_s,
            )
            metrics[f"base_{b.name}"]["time_offset_s"] = float(result.lag_s)
            metrics[f"base_{b.name}"]["time_offset_correlation"] = float(result.correlation)
            if not np.isfinite(result.correlation) or result.correlation < MIN_OFFSET_CORRELATION:
                notes.append(
                    f"time offset to base '{b.name}' not determined: correlation "
                    f"{result.correlation:.2f} of the short-period variations is too low"
                )
                continue
            checks.append(
                Check.at_most(
                    f"diurnal time offset ({b.name})",
                    abs(result.lag_s),
                    offset_tol,
                    "s",
                    offset_src,
                    detail=f"survey clock minus base clock {result.lag_s:+.2f} s from {result.n} readings "
                    f"within {cfg.offset_radius_m:g} m, correlation {result.correlation:.2f}",
                )
            )
    diff_tol, diff_src = ctx.tolerance("diurnal_station_difference_nT", 5.0, "project default")
    for i in range(len(bases)):
        for j in range(i + 1, len(bases)):
            a, b = bases[i], bases[j]
            ca, cb = cleaned[i], cleaned[j]
            ina = ca.good & (a.time >= span[0]) & (a.time <= span[1])
            # raw records give the level difference of the sites; with datum jumps in either
            # record, the levelled ones (the jump would otherwise read as a difference)
            split = len(session_levels[i]) > 1 or len(session_levels[j]) > 1
            la, lb = (levelled_values[i], levelled_values[j]) if split else (a.value, b.value)
            stats = station_difference(a.time[ina], la[ina], b.time[cb.good], lb[cb.good], cfg.max_gap_s)
            metrics[f"station_difference_{a.name}_{b.name}"] = stats
            if stats["n"]:
                checks.append(
                    Check.at_most(
                        f"diurnal station difference ({a.name} - {b.name})",
                        stats["max_abs"],
                        diff_tol,
                        "nT",
                        diff_src,
                        detail=f"largest departure of the difference from its median "
                        f"{stats['level_difference']:.2f} nT; std {stats['std']:.2f} nT",
                    )
                )

    # --- tables, metrics, notes ----------------------------------------------------------------
    grouped = table.groupby("line", sort=False)
    lines = pd.DataFrame(
        {
            "readings": grouped.size(),
            "diurnal_mean": grouped["diurnal"].mean(),
            "diurnal_min": grouped["diurnal"].min(),
            "diurnal_max": grouped["diurnal"].max(),
            "flag_base_gap": grouped["flag_base_gap"].sum(),
        }
    ).reset_index()
    flagged = int(gap.sum())
    metrics.update(
        {
            "readings_flag_base_gap": flagged,
            "diurnal_min_nT": float(np.nanmin(diurnal)),
            "diurnal_max_nT": float(np.nanmax(diurnal)),
            "interpolation": cfg.interpolation,
            "datum": cfg.datum,
        }
    )
    names = ", ".join(f"'{b.name}'" for b in bases)
    notes.insert(
        0,
        f"diurnal correction from base(s) {names} ({cfg.interpolation} interpolation, "
        f"datum {cfg.datum}): {np.nanmin(diurnal):.2f} to {np.nanmax(diurnal):.2f} nT",
    )
    if flagged:
        warnings.append(
            f"{flagged:,} readings flagged in base gaps longer than {cfg.max_gap_s:g} s "
            "or outside the base record (flag_base_gap)"
        )
    state = {
        "bases": [
            {
                "name": b.name,
                "file": str(b.path),
                "longitude": b.longitude,
                "latitude": b.latitude,
                "datum_nT": float(d),
                "session_datums_nT": [float(x) for x in levels],
            }
            for b, d, levels in zip(bases, datums, session_levels)
        ],
        "interpolation": cfg.interpolation,
        "datum": cfg.datum,
    }
    return StageOutput(
        table=table,
        metrics=metrics,
        state=state,
        tables={"diurnal_lines": lines, "base_record": _base_record_table(bases, cleaned)},
        checks=checks,
        notes=notes,
        warnings=warnings,
        degraded=degraded,
    )


def _remote_reference(ctx: StageContext) -> StageOutput:
    """Diurnal correction from an observatory network's fitted external field (no local base)."""
    from ..fields.harmonic.separation import external_field_at, remote_reference_caution
    from ._boundary import translate

    cfg = ctx.config.diurnal
    path = ctx.survey.resolve(cfg.remote_reference)
    if not path.is_file():
        raise InputDataError(
            "remote-reference coefficient table not found",
            file=path,
            key="diurnal.remote_reference",
            fix="run the observatory network first and point at its out/tables/coefficients.csv",
        )
    coefficients = pd.read_csv(path)
    table = ctx.table.copy(deep=False)  # copy-on-write: new columns only
    with translate(
        InputDataError,
        file=path,
        key="diurnal.remote_reference",
        fix="use the coefficients table written by the observatory network's separate stage",
    ):
        variation = external_field_at(
            coefficients,
            table["longitude"].to_numpy(),
            table["latitude"].to_numpy(),
            table["height"].to_numpy(),
            table["time"].to_numpy(dtype="datetime64[ns]"),
        )
    missing = ~np.isfinite(variation)
    if missing.all():
        raise InputDataError(
            "the remote-reference coefficients do not cover the survey's times",
            file=path,
            key="diurnal.remote_reference",
            fix="use a network run that spans the survey days",
        )
    datum = float(np.nanmedian(variation)) if cfg.datum == "median" else float(cfg.datum_value or 0.0)
    table["diurnal"] = np.where(missing, 0.0, variation - datum)
    table["flag_base_gap"] = missing
    stations_path = path.with_name("station_residuals.csv")
    lon_c, lat_c = float(table["longitude"].mean()), float(table["latitude"].mean())
    warnings = []
    if stations_path.is_file():
        stations = pd.read_csv(stations_path)
        if {"station", "longitude", "latitude"} <= set(stations.columns):
            warnings.append(remote_reference_caution(stations, lon_c, lat_c))
    if not warnings:
        warnings.append(
            "Diurnal correction from a remote reference (observatory network model), "
            "not a local base: check the levelling misclosures before relying on it."
        )
    degraded = (
        [
            f"{int(missing.sum()):,} readings outside the remote reference's times: no "
            "diurnal correction there (flag_base_gap)"
        ]
        if missing.any()
        else []
    )
    return StageOutput(
        table=table,
        warnings=warnings,
        degraded=degraded,
        metrics={
            "method": "remote reference",
            "datum_nT": datum,
            "readings_without_reference": int(missing.sum()),
        },
        notes=[f"diurnal correction from {cfg.remote_reference} (remote reference)"],
    )


def _inputs(config, survey):
    files = [survey.resolve(b.file) for b in config.diurnal.bases]
    if not config.diurnal.bases and config.diurnal.remote_reference:
        files.append(survey.resolve(config.diurnal.remote_reference))
    return files


STAGE = Stage(
    name="diurnal",
    summary="remove the external field variation recorded at base magnetometers (diurnal correction)",
    run=run,
    sections=("diurnal",),
    inputs=_inputs,
    kinds=("magnetic",),
    contract=Contract(
        provides_columns=("diurnal", "flag_base_gap"),
        reads=("time", "longitude", "latitude", "height", "total_field", "line", "flag_*"),
        requires_state=("ingest",),
        provides_tables=("diurnal_lines", "base_record"),
    ),
)
