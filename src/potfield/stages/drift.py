"""drift stage (gravity): calibration, instrument height, Earth tide, instrument drift and the tie
to absolute bases.

Columns added, in the order applied (all mGal)::

    reading_mgal                  reading after the calibration table (= reading when in mGal)
    instrument_height_correction  + free_air_gradient * instrument_height (sensor -> mark)
    tide                          tide correction ADDED (Longman 1959, potfield.fields.gravity.tides)
    drift                         time-varying drift (and tares) REMOVED
    loop_offset                   reading level of the loop REMOVED (ties it to the bases)
    gravity                       reading_mgal + instrument_height_correction + tide
                                  - drift - loop_offset: absolute observed gravity at the mark
    drift_residual                gravity minus the station's adjusted gravity
    loop                          the loop of each reading (only when the table has no loop column)

Loops: the ``loop`` column when present, else the ``line`` column when one is mapped in
[input.columns], else the local solar day at the survey's mean longitude; ``[drift] loops``
("loop", "line", "day") chooses explicitly.

Methods (``[drift] method``):

* ``"network"``: least-squares adjustment of all readings with a level and a linear drift per
  loop, and the bases fixed or weighted (Hinze, von Frese and Saad 2013). A tare in
  ``[drift] tares`` cuts every loop that spans it into segments with their own levels, tied
  through the stations they share (reread a station after a tare); a jump between readings of
  a station that no drift explains (a dial/range change) stops the stage with the tare to add.
  A ``meter`` column (several gravimeters) keeps each meter's loops and segments apart.
* ``"linear"`` / ``"piecewise"``: drift per loop from the repeats of its drift base (the
  configured bases when the loop occupies them twice or more, else the loop's most often occupied
  station), then each loop is tied to the configured bases, or to stations already tied by an
  earlier loop, by the mean difference at those stations. Bases are held at their values.

Tables: ``loops``, ``stations``, ``repeats`` (and ``tares``, ``segments`` when a tare cuts a
loop). Checks: the drift rate of every loop and the repeat
differences / residual closure against the spec (common practice values).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import ConfigError, InputDataError, ModelRangeError, StageError, format_rows
from ..fields.errors import BadParameter, FieldError
from ..fields.gravity import network as gravnet
from ._boundary import Rule, translate
from .base import Check, Contract, Stage, StageContext, StageOutput, usable

#: Default spec values (common practice for ground gravity loops with spring gravimeters).
DRIFT_RATE_DEFAULT = 0.05  # mGal/h
REPEAT_DEFAULT = 0.03  # mGal
_SPEC_SOURCE = "common practice (ground gravity loop specifications)"


# ------------------------------------------------------------------------------------------------
# helpers
# ------------------------------------------------------------------------------------------------
def _where(table: pd.DataFrame, positions) -> str:
    """'file row N' for the first reading at ``positions`` (0-based table positions)."""
    positions = np.asarray(positions, dtype=int)
    if positions.size == 0:
        return ""
    first = positions[0]
    if "source_file" in table and "source_row" in table:
        files = table["source_file"].to_numpy()
        rows = table["source_row"].to_numpy()[positions[files[positions] == files[first]]]
        return f"{files[first]} row {format_rows(rows)}"
    return f"table row {format_rows(positions + 1)}"


def read_calibration(path: Path) -> pd.DataFrame:
    """Read a calibration (interval) table: delimited text with columns counter, mgal, factor."""
    if not path.is_file():
        raise ConfigError(
            "calibration file not found",
            file=path,
            key="drift.calibration_file",
            fix="check the file name in survey.toml",
        )
    try:
        cal = pd.read_csv(path, sep=None, engine="python", comment="#", skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as err:
        raise InputDataError(
            f"cannot read the calibration table ({str(err).splitlines()[0]})",
            file=path,
            fix="write a delimited table with a header line 'counter,mgal,factor'",
        ) from None
    cal.columns = [str(c).strip().lower() for c in cal.columns]
    try:
        gravnet.calibration_arrays(cal)
    except gravnet.CalibrationTableError as err:
        # data row n is file line n + 1 (header on line 1, no comments assumed)
        row = None if err.table_row is None else err.table_row + 1
        raise InputDataError(err.message, file=path, row=row, fix=err.hint) from None
    return cal


def _loop_labels(ctx: StageContext, table: pd.DataFrame) -> tuple[np.ndarray, str]:
    """Loop label of every reading and the rule used.

    ``auto``: the ``loop`` column when present, else the ``line`` column when the user mapped
    one in [input.columns], else the local solar day (UTC shifted by the mean longitude / 15 h,
    so a day's loop is not cut at UTC midnight far from Greenwich).
    """
    choice = ctx.config.drift.loops
    if choice == "auto":
        if "loop" in table:
            choice = "loop"
        elif "line" in table and "line" in ctx.config.input.columns:
            choice = "line"
        else:
            choice = "day"
    if choice in ("loop", "line"):
        if choice not in table:
            raise ConfigError(
                f"the readings have no '{choice}' column",
                key="drift.loops",
                fix=f"map a {choice} column in [input.columns] or set loops = 'day'",
            )
        col = table[choice]
        missing = col.isna().to_numpy()
        if missing.any():
            raise InputDataError(
                f"{_where(table, np.flatnonzero(missing))}: {choice} is missing",
                fix=f"give every reading a {choice}, or set [drift] loops = 'day'",
            )
        return col.astype(str).str.strip().to_numpy(dtype=object), choice
    lon = table["longitude"].to_numpy(dtype=float) if "longitude" in table else np.zeros(1)
    lon = float(np.nanmean(lon)) if np.isfinite(lon).any() else 0.0
    lon = (lon + 180.0) % 360.0 - 180.0
    shift = np.timedelta64(int(round(lon / 15.0 * 3.6e12)), "ns")
    local = table["time"].to_numpy().astype("datetime64[ns]") + shift
    days = np.datetime_as_string(local.astype("datetime64[D]")).astype(object)
    return days, f"local solar day (UTC {lon / 15.0:+.1f} h)"


def _station_ids(table: pd.DataFrame) -> np.ndarray:
    if "station" not in table:
        raise InputDataError(
            "the readings have no station column",
            key="input.columns.station",
            fix="map the station id column in [input.columns]",
        )
    col = table["station"]
    text = col.astype(str).str.strip()
    if pd.api.types.is_float_dtype(col):  # numeric ids read as floats: "101.0" -> "101"
        values = col.to_numpy(dtype=float)
        whole = np.isfinite(values) & (values == np.round(values))
        text = pd.Series(
            np.where(
                whole, np.char.mod("%d", np.nan_to_num(values).astype(np.int64)), text.to_numpy(dtype=str)
            ),
            index=col.index,
        )
    missing = col.isna().to_numpy() | (text == "").to_numpy()
    if missing.any():
        raise InputDataError(
            f"{_where(table, np.flatnonzero(missing))}: station id is missing",
            fix="give every reading its station id",
        )
    return text.to_numpy(dtype=object)


def _calibrated(ctx: StageContext, table: pd.DataFrame, notes: list[str], warnings: list[str]) -> np.ndarray:
    cfg = ctx.config.drift
    units = ctx.config.input.units.get("reading", "mGal")
    reading = table["reading"].to_numpy(dtype=float)
    if units != "cu":
        if cfg.calibration_file:
            raise ConfigError(
                f"a calibration file is given but readings are in {units}",
                key="drift.calibration_file",
                fix="set [input.units] reading = 'cu' for counter units, or remove calibration_file",
            )
        return reading.copy()
    if not cfg.calibration_file:
        raise ConfigError(
            "readings are in counter units but no calibration table is given",
            key="drift.calibration_file",
            fix="set [drift] calibration_file to the meter's table (columns counter, mgal, factor)",
        )
    path = ctx.survey.resolve(cfg.calibration_file)
    cal = read_calibration(path)
    c = cal["counter"].to_numpy(dtype=float)
    outside = np.isfinite(reading) & ((reading < c[0]) | (reading > c[-1]))
    flagged = outside & ~usable(table)
    if (outside & ~flagged).any():
        raise InputDataError(
            f"{_where(table, np.flatnonzero(outside & ~flagged))}: counter reading outside the "
            f"calibration table {path.name} ({c[0]:g} to {c[-1]:g})",
            fix="extend the calibration table or correct the reading",
        )
    if flagged.any():
        warnings.append(
            f"{int(flagged.sum())} flagged reading(s) outside the calibration table left without a value"
        )
    with translate(InputDataError, file=path):
        out = gravnet.apply_calibration(np.where(flagged, np.nan, reading), cal)
    notes.append(f"calibrated counter readings with {path.name} ({len(cal)} intervals)")
    return out


def _tide(ctx: StageContext, table: pd.DataFrame) -> np.ndarray:
    missing = [c for c in ("longitude", "latitude") if c not in table]
    if missing:
        raise StageError(
            f"the tide correction needs {', '.join(missing)}",
            key="drift.tide",
            fix="map the coordinates in [input.columns] or set [drift] tide = false",
        )
    from ..fields.gravity.tides import longman_correction

    height = table["height"].to_numpy(dtype=float) if "height" in table else np.zeros(len(table))
    with translate(ModelRangeError, fix="check the dates of the readings"):
        return np.asarray(
            longman_correction(
                table["longitude"].to_numpy(dtype=float),
                table["latitude"].to_numpy(dtype=float),
                np.nan_to_num(height),
                table["time"].to_numpy().astype("datetime64[ns]"),
                ctx.config.drift.gravimetric_factor,
            ),
            dtype=float,
        )


def _check_bases(ctx: StageContext, stations: np.ndarray, use: np.ndarray) -> dict:
    cfg = ctx.config.drift
    if not cfg.bases:
        raise ConfigError(
            "no absolute gravity base is given",
            key="drift.bases",
            fix="add a [[drift.bases]] table with station = 'ID' and gravity = absolute gravity in mGal",
        )
    bases = {}
    for i, base in enumerate(cfg.bases):
        name = base.station.strip()
        key = f"drift.bases[{i}].station"
        if name in bases:
            raise ConfigError(f"base '{name}' is given twice", key=key, fix="keep one entry per base")
        at = stations == name
        if not at.any():
            raise ConfigError(
                f"base station '{name}' is never occupied in the readings",
                key=key,
                fix="use the station id exactly as in the station column",
            )
        if not (at & use).any():
            raise ConfigError(
                f"base station '{name}' has only flagged or missing readings",
                key=key,
                fix="check its readings or choose another base",
            )
        bases[name] = (float(base.gravity), base.sigma_mgal)
    return bases


def _tare_times(ctx: StageContext) -> list[np.datetime64]:
    out = []
    for i, text in enumerate(ctx.config.drift.tares):
        try:
            stamp = pd.Timestamp(text)
        except (ValueError, TypeError):
            raise ConfigError(
                f"tare time '{text}' is not an ISO 8601 time",
                key=f"drift.tares[{i}]",
                fix="write e.g. '2024-05-01T13:20:00'",
            ) from None
        if stamp.tzinfo is not None:
            stamp = stamp.tz_convert("UTC").tz_localize(None)
        out.append(np.datetime64(stamp.to_datetime64(), "ns"))
    return out


# ------------------------------------------------------------------------------------------------
# loop methods
# ------------------------------------------------------------------------------------------------
def _loop_method(method, time, value, stations, loops, use, bases, warnings, degraded):
    """Drift per loop from base repeats, then tie every loop to bases or tied stations."""
    n = value.size
    codes, labels = pd.factorize(pd.Series(loops), sort=False)
    is_base = np.zeros(n, dtype=bool)
    base_value = np.zeros(n)
    for k in range(len(labels)):
        sel = (codes == k) & use
        at_base = sel & np.isin(stations, list(bases))
        if at_base.sum() >= 2:
            is_base |= at_base
            base_value[at_base] = (
                pd.Series(stations[at_base])
                .map({name: g for name, (g, _) in bases.items()})
                .to_numpy(dtype=float)
            )
            continue
        counts = pd.Series(stations[sel]).value_counts(sort=False)
        if counts.empty or counts.max() < 2:
            warnings.append(f"loop {labels[k]}: no station occupied twice, drift not corrected")
            degraded.append(warnings[-1])
            continue
        best = counts.index[int(np.argmax(counts.to_numpy()))]  # first of the most occupied
        is_base |= sel & (stations == best)
    with translate(InputDataError, key="drift.method"):
        result = gravnet.loop_drift(
            time, value, is_base, loops, method=method, base_value=base_value, use=use
        )
    drift = np.nan_to_num(result.drift, nan=0.0)  # loops without repeats: no drift removed
    corrected = value - drift

    # Tie loops: configured bases first, then stations tied by earlier loops (in time order).
    known = {s: g for s, (g, _) in bases.items()}
    offset = np.full(n, np.nan)
    start = np.array([time[codes == k].min() for k in range(len(labels))])
    has_use = np.bincount(codes[use], minlength=len(labels)) > 0
    pending = [k for k in np.argsort(start, kind="stable") if has_use[k]]
    progress = True
    while pending and progress:
        progress = False
        for k in list(pending):
            sel = (codes == k) & use
            ref = sel & np.isin(stations, list(bases))
            if not ref.any():
                ref = sel & np.isin(stations, list(known))
            if not ref.any():
                continue
            level = float(np.mean(corrected[ref] - pd.Series(stations[ref]).map(known).to_numpy(float)))
            offset[codes == k] = level
            means = pd.Series(corrected[sel] - level).groupby(stations[sel]).mean()
            known.update({s: float(g) for s, g in means.items() if s not in known})
            pending.remove(k)
            progress = True
    if pending:
        names = ", ".join(str(labels[k]) for k in pending[:5])
        raise InputDataError(
            f"loop(s) {names} occupy no base and no station of a tied loop",
            key="drift.method",
            fix="occupy a base in each loop, add a base, or use method = 'network'",
        )
    table = result.loops.rename(
        columns={"base_readings": "drift_base_readings", "max_base_residual_mgal": "residual_closure_mgal"}
    )
    table["offset_mgal"] = [float(offset[codes == k][0]) for k in range(len(labels))]  # per loop
    table["readings"] = np.bincount(codes, minlength=len(labels))
    return drift, offset, table, np.nan, None


def _network_method(time, value, stations, loops, use, bases, tares, reading_sigma, warnings, meter=None):
    with translate({BadParameter: Rule(InputDataError, key="drift.bases"), FieldError: InputDataError}):
        result = gravnet.network_adjustment(
            stations,
            time,
            value,
            loops,
            bases,
            tares=tares,
            reading_sigma=reading_sigma,
            use=use,
            meter=meter,
        )
    warnings.extend(result.warnings)
    table = result.loops.rename(columns={"max_abs_residual_mgal": "residual_closure_mgal"})
    table = table.drop(columns=["t0"])
    return np.nan_to_num(result.drift, nan=0.0), result.offset, table, result.sigma0, result


# ------------------------------------------------------------------------------------------------
# the stage
# ------------------------------------------------------------------------------------------------
def run(ctx: StageContext) -> StageOutput:
    """Correct gravity readings for calibration, instrument height, tide and drift; tie them to
    the absolute bases (see the module docstring; Hinze, von Frese and Saad 2013, Gravity and
    Magnetic Exploration, Cambridge University Press; Longman 1959, J. Geophys. Res. 64:2351)."""
    cfg = ctx.config.drift
    if ctx.table is None:
        raise StageError("the drift stage needs the readings table", fix="run the ingest stage first")
    if not cfg.enabled:
        why = (
            "drift stage disabled ([drift] enabled = false): the readings are taken as final "
            "observed gravity (mGal); no calibration, tide, drift or base ties applied here"
        )
        return StageOutput(notes=[why], skipped=why)
    src = ctx.table
    for col in ("time", "reading"):
        if col not in src:
            raise InputDataError(
                f"the readings have no {col} column",
                key=f"input.columns.{col}",
                fix=f"map the {col} column in [input.columns]",
            )
    table = src.copy(deep=False)  # copy-on-write: new columns only
    notes: list[str] = []
    warnings: list[str] = []
    degraded: list[str] = []
    n = len(table)
    time = table["time"].to_numpy().astype("datetime64[ns]")
    stations = _station_ids(table)
    loops, rule = _loop_labels(ctx, table)
    notes.append(f"loops told apart by {rule}: {len(pd.unique(loops))} loop(s)")

    # 1. calibration
    table["reading_mgal"] = _calibrated(ctx, table, notes, warnings)
    # 2. instrument height (sensor above the mark -> add the free-air gradient times the height)
    if "instrument_height" in src:
        ih = src["instrument_height"].to_numpy(dtype=float)
        table["instrument_height_correction"] = gravnet.instrument_height_correction(
            ih, cfg.free_air_gradient
        )
        missing = ~np.isfinite(ih)
        if missing.any():
            table["flag_instrument_height"] = missing
            warnings.append(
                f"{int(missing.sum())} reading(s) without instrument height flagged "
                f"({_where(table, np.flatnonzero(missing))})"
            )
    else:
        table["instrument_height_correction"] = 0.0
        notes.append("no instrument_height column: readings taken as at the station mark")
    # 3. tide (not twice: a tide the gravimeter already added stays in meter_tide)
    tide_by_meter = cfg.meter_tide_applied
    if tide_by_meter is None:
        tide_by_meter = "meter_tide" in src and bool(np.nan_to_num(src["meter_tide"].to_numpy(float)).any())
    if tide_by_meter and cfg.tide:
        table["tide"] = 0.0
        notes.append(
            "Earth tide already corrected by the gravimeter (meter_tide / [drift] "
            "meter_tide_applied): potfield adds none"
        )
    elif cfg.tide:
        table["tide"] = _tide(ctx, table)
        notes.append(f"Earth tide (Longman 1959) corrected, gravimetric factor {cfg.gravimetric_factor:g}")
    else:
        table["tide"] = 0.0
        notes.append("Earth tide not corrected ([drift] tide = false)")
    value = (
        table["reading_mgal"].to_numpy()
        + table["instrument_height_correction"].to_numpy()
        + table["tide"].to_numpy()
    )
    use = usable(table) & np.isfinite(value)
    lost = usable(table) & ~np.isfinite(value)
    if lost.any():
        warnings.append(
            f"{int(lost.sum())} unflagged reading(s) without a value (reading, "
            f"instrument height or tide missing) left out: {_where(table, np.flatnonzero(lost))}"
        )
    bases = _check_bases(ctx, stations, use)
    tares = _tare_times(ctx)

    # 4. drift and ties
    if cfg.method == "network":
        meter = src["meter"].astype(str).str.strip().to_numpy(dtype=object) if "meter" in src else None
        drift, offset, loop_table, sigma0, net = _network_method(
            time, value, stations, loops, use, bases, tares, cfg.reading_sigma_mgal, warnings, meter
        )
    else:
        if tares:
            warnings.append("[drift] tares are used only by method = 'network'; ignored")
        if any(sigma is not None for _, sigma in bases.values()):
            notes.append("base sigma_mgal is used only by method = 'network'; bases held fixed")
        drift, offset, loop_table, sigma0, net = _loop_method(
            cfg.method, time, value, stations, loops, use, bases, warnings, degraded
        )
    table["drift"] = drift
    table["loop_offset"] = offset
    gravity = value - drift - offset
    table["gravity"] = gravity
    if "loop" not in src:
        table["loop"] = loops

    # 5. stations and repeats
    fit = use & np.isfinite(gravity)
    frame = pd.DataFrame({"station": stations, "gravity": gravity, "loop": loops})[fit]
    grouped = frame.groupby("station", sort=True)
    per = grouped["gravity"].agg(["mean", "std", "count", "min", "max"])
    st = pd.DataFrame(index=pd.Index(pd.unique(np.sort(stations.astype(str))), name="station"))
    if net is not None:
        st["gravity"] = net.stations["gravity"].reindex(st.index)
        st["sigma_mgal"] = net.stations["sigma_mgal"].reindex(st.index)
    else:
        st["gravity"] = per["mean"].reindex(st.index)
        st["sigma_mgal"] = (per["std"] / np.sqrt(per["count"])).reindex(st.index)
        for name, (g, _) in bases.items():
            st.loc[name, ["gravity", "sigma_mgal"]] = [g, 0.0]
    st["occupations"] = per["count"].reindex(st.index).fillna(0).astype(int)
    st["base"] = st.index.isin(list(bases))
    for col in ("longitude", "latitude", "height", "easting", "northing", "elevation"):
        if col in src:
            st[col] = pd.Series(src[col].to_numpy(dtype=float)).groupby(stations).mean().reindex(st.index)
    table["drift_residual"] = gravity - st["gravity"].reindex(stations).to_numpy()

    rep = per[per["count"] >= 2]
    repeats = pd.DataFrame(
        {
            "station": rep.index,
            "occupations": rep["count"].to_numpy(dtype=int),
            "loops": grouped["loop"].nunique().reindex(rep.index).to_numpy(dtype=int),
            "range_mgal": (rep["max"] - rep["min"]).to_numpy(),
            "std_mgal": rep["std"].to_numpy(),
            "base": rep.index.isin(list(bases)),
        }
    )

    # 6. checks
    rate_tol, rate_src = ctx.tolerance("gravity_drift_rate_mgal_per_h", DRIFT_RATE_DEFAULT, _SPEC_SOURCE)
    rep_tol, rep_src = ctx.tolerance("gravity_repeat_mgal", REPEAT_DEFAULT, _SPEC_SOURCE)
    checks: list[Check] = []
    rates = loop_table["drift_rate_mgal_per_h"].to_numpy(dtype=float)
    if np.isfinite(rates).any():
        worst = int(np.nanargmax(np.abs(rates)))
        checks.append(
            Check.at_most(
                "gravity_drift_rate",
                abs(rates[worst]),
                rate_tol,
                "mGal/h",
                rate_src,
                detail=f"largest |drift rate|: loop {loop_table['loop'].iloc[worst]}",
            )
        )
    else:
        warnings.append("no loop has a drift rate: drift rate check not made")
        degraded.append(warnings[-1])
    if len(repeats):
        worst = int(np.argmax(repeats["range_mgal"].to_numpy()))
        checks.append(
            Check.at_most(
                "gravity_repeat_difference",
                repeats["range_mgal"].iloc[worst],
                rep_tol,
                "mGal",
                rep_src,
                detail=f"largest repeat range: station {repeats['station'].iloc[worst]}",
            )
        )
    else:
        warnings.append("no station was occupied twice: repeat check not made")
    closure = loop_table["residual_closure_mgal"].to_numpy(dtype=float)
    if np.isfinite(closure).any():
        worst = int(np.nanargmax(closure))
        checks.append(
            Check.at_most(
                "gravity_loop_closure",
                closure[worst],
                rep_tol,
                "mGal",
                rep_src,
                detail=f"largest residual closure after drift: loop {loop_table['loop'].iloc[worst]}",
            )
        )

    metrics = {
        "method": cfg.method,
        "loops": int(len(loop_table)),
        "stations": int(len(st)),
        "bases": len(bases),
        "max_abs_drift_rate_mgal_per_h": float(np.nanmax(np.abs(rates)))
        if np.isfinite(rates).any()
        else None,
        "max_repeat_range_mgal": float(repeats["range_mgal"].max()) if len(repeats) else None,
        "sigma0": None if not np.isfinite(sigma0) else float(sigma0),
        "tide_range_mgal": float(np.ptp(table["tide"].to_numpy())) if n else 0.0,
    }
    state = {
        "method": cfg.method,
        "loop_rule": rule,
        "bases": {name: g for name, (g, _) in bases.items()},
        "tide": bool(cfg.tide),
        "tide_by_meter": bool(tide_by_meter),
        "gravimetric_factor": float(cfg.gravimetric_factor),
        "sigma0": metrics["sigma0"],
    }
    tables = {"loops": loop_table, "stations": st.reset_index(), "repeats": repeats}
    if net is not None and len(net.tares):
        tables["tares"] = net.tares
    if net is not None and len(net.segments) > len(loop_table):
        tables["segments"] = net.segments  # some loop is cut by a tare
    notes.append(
        f"{cfg.method} drift over {len(loop_table)} loop(s), {len(st)} station(s), "
        f"tied to {len(bases)} base(s)"
    )
    return StageOutput(
        table=table,
        metrics=metrics,
        state=state,
        tables=tables,
        checks=checks,
        notes=notes,
        warnings=warnings,
        degraded=degraded,
    )


def _inputs(config, survey) -> list[Path]:
    cal = config.drift.calibration_file
    return [survey.resolve(cal)] if cal else []


STAGE = Stage(
    name="drift",
    summary="gravity: calibration, instrument height, Earth tide, loop drift or network "
    "adjustment with tares, tie to absolute bases",
    run=run,
    sections=("drift",),
    inputs=_inputs,
    kinds=("gravity",),
    contract=Contract(
        provides_columns=(
            "reading_mgal",
            "instrument_height_correction",
            "tide",
            "drift",
            "loop_offset",
            "gravity",
            "drift_residual",
        ),
        optional_columns=("loop", "flag_instrument_height"),
        # loop: added only when the table has none, so it is read
        reads=(
            "time",
            "reading",
            "station",
            "loop",
            "line",
            "meter",
            "meter_tide",
            "instrument_height",
            "longitude",
            "latitude",
            "height",
            "easting",
            "northing",
            "elevation",
            "source_file",
            "source_row",
            "flag_*",
        ),
        requires_state=("ingest",),
        provides_tables=("loops", "stations", "repeats", "tares", "segments"),
    ),
)
