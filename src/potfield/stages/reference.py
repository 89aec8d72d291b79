"""reference stage: remove the reference field (IGRF for magnetics and observatories; normal
gravity, atmospheric, free-air, Bouguer and terrain for gravity). The physics is in
potfield.fields; this module only dispatches by survey kind."""

from __future__ import annotations

from .base import Stage, StageContext, StageOutput


def run(ctx: StageContext) -> StageOutput:
    if ctx.config.kind == "gravity":
        from .reference_gravity import run_gravity

        return run_gravity(ctx)
    from .reference_magnetic import run_magnetic

    return run_magnetic(ctx)


def _inputs(config, survey):
    return [survey.resolve(config.reference.dem_file)] if config.reference.dem_file else []


STAGE = Stage(
    name="reference",
    summary="subtract the reference field: IGRF-14 (magnetic, observatory); normal gravity, "
    "atmospheric, free-air, Bouguer and terrain (gravity)",
    run=run,
    sections=("reference", "diurnal", "drift"),
    inputs=_inputs,
)
