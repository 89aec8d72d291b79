"""reference stage: remove the reference field (IGRF for magnetics and observatories; normal
gravity, atmospheric, free-air, Bouguer and terrain for gravity). The physics is in
potfield.fields; this module only dispatches by survey kind.

``[reference] enabled = false`` (data already reduced elsewhere): the value is taken as the
anomaly as it is (magnetic: ``total_field`` minus ``diurnal`` when the diurnal stage made it;
gravity: ``gravity`` of the drift stage, else ``reading`` in mGal), and the stage is recorded as
skipped.
"""

from __future__ import annotations

from ..errors import StageError
from .base import ANOMALY_COLUMN, Contract, Stage, StageContext, StageOutput
from .reference_gravity import COLUMNS as GRAVITY_COLUMNS
from .reference_magnetic import MAGNETIC_COLUMNS, OBSERVATORY_COLUMNS


def _as_is(ctx: StageContext) -> StageOutput:
    """The value taken as the anomaly, unchanged (``[reference] enabled = false``)."""
    kind, table = ctx.config.kind, ctx.table
    if kind == "observatory":
        raise StageError(
            "the reference stage cannot be disabled for observatory surveys (the "
            "separation needs the IGRF disturbance)",
            key="reference.enabled",
            fix="remove 'enabled = false' from [reference]",
        )
    column = ANOMALY_COLUMN[kind]
    if kind == "magnetic":
        source = "total_field"
        if source not in table.columns:
            raise StageError(
                "the readings table has no 'total_field' column to take as the anomaly",
                key="input.columns.total_field",
                fix="map the anomaly column of the input files to total_field",
            )
        values = table[source].to_numpy(dtype=float)
        if "diurnal" in table.columns:
            values = values - table["diurnal"].to_numpy(dtype=float)
            source = "total_field - diurnal"
    else:
        source = "gravity" if "gravity" in table.columns else "reading"
        if source not in table.columns:
            raise StageError(
                "the readings table has neither 'gravity' nor 'reading' to take as the anomaly",
                key="input.columns.reading",
                fix="map the anomaly column of the input files to reading",
            )
        if source == "reading" and ctx.config.input.units.get("reading", "mGal") == "cu":
            raise StageError(
                "readings in counter units cannot be taken as an anomaly",
                key="reference.enabled",
                fix="give the readings in mGal, or enable the drift and reference stages",
            )
        values = table[source].to_numpy(dtype=float)
    out = table.copy(deep=False)
    out[column] = values
    why = (
        f"reference stage disabled ([reference] enabled = false): {column} = {source} as "
        "given (taken as already reduced; no reference field removed here)"
    )
    return StageOutput(
        table=out,
        notes=[why],
        skipped=why,
        state={"value_column": column, "source": source, "reduced": False},
    )


def run(ctx: StageContext) -> StageOutput:
    if ctx.table is None:
        raise StageError("no readings table", fix="run the ingest stage first")
    if not ctx.config.reference.enabled:
        return _as_is(ctx)
    if ctx.config.kind == "gravity":
        from .reference_gravity import run_gravity

        out = run_gravity(ctx)
    else:
        from .reference_magnetic import run_magnetic

        out = run_magnetic(ctx)
    if ctx.config.kind in ANOMALY_COLUMN:  # the value column of the later stages
        out.state.setdefault("value_column", ANOMALY_COLUMN[ctx.config.kind])
    return out


def _inputs(config, survey):
    return [survey.resolve(config.reference.dem_file)] if config.reference.dem_file else []


STAGE = Stage(
    name="reference",
    summary="subtract the reference field: IGRF-14 (magnetic, observatory); normal gravity, "
    "atmospheric, free-air, Bouguer and terrain (gravity)",
    run=run,
    sections=("reference", "diurnal", "drift"),
    inputs=_inputs,
    contract=Contract(
        # all of them when the reference is removed; only the anomaly when it is disabled
        provides_columns={
            "magnetic": MAGNETIC_COLUMNS,
            "gravity": GRAVITY_COLUMNS,
            "observatory": ("igrf_north", "igrf_east", "igrf_down", "igrf", "flag_reference_missing"),
        },
        optional_columns={"observatory": OBSERVATORY_COLUMNS},
        reads={
            "gravity": ("gravity", "reading", "latitude", "height", "easting", "northing", "flag_*"),
            "*": (
                "time",
                "longitude",
                "latitude",
                "height",
                "total_field",
                "mag_north",
                "mag_east",
                "mag_down",
                "diurnal",
                "station",
                "line",
                "source_file",
                "source_row",
                "flag_*",
            ),
        },
        requires_state=("ingest",),
        provides_tables={"observatory": ("reference_stations",), "*": ()},
    ),
)
