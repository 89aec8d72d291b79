"""report stage: QC maps (out/maps/*.png) and the self-contained out/report.html.

The same builder serves ``potfield report DIR``, which rebuilds from out/ without recomputing.
"""

from __future__ import annotations

from ..qc.report import REPORT_READS
from .base import Contract, Stage, StageContext, StageOutput


def run(ctx: StageContext) -> StageOutput:
    # matplotlib (about 0.6 s to import) is loaded only when the report is drawn, not whenever
    # the runner loads the stage list
    from ..qc.report import build_report

    manifest = dict(ctx.manifest)
    manifest["stages"] = {k: v for k, v in manifest.get("stages", {}).items() if k != "report"}
    manifest["spec"] = {k: list(v) for k, v in ctx.spec.items()}
    paths = getattr(ctx.grids, "paths", None) or {}
    ctx.progress("drawing maps")
    path, count = build_report(ctx.survey, ctx.config, manifest, ctx.table, paths)
    return StageOutput(
        metrics={"figures": count, "report": str(path.name)},
        notes=[f"{count} figures in out/maps; report at out/{path.name}"],
    )


STAGE = Stage(
    name="report",
    summary="QC maps, residual tables and the self-contained HTML report with spec checks and provenance",
    run=run,
    sections=("report",),
    contract=Contract(
        requires_state=("ingest",),
        # what qc/report.py and qc/maps.py draw and tabulate (the readings table is not all
        # read: at 1e7 readings that would be ~2 GB)
        reads=REPORT_READS,
    ),
)
