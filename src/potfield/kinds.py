"""Survey kinds and the order of their stages (design.md). A leaf module: the runner
(:mod:`potfield.pipeline`), the command line and the report read it without importing each other."""

from __future__ import annotations

#: Stage order per survey kind.
KIND_ORDER: dict[str, tuple[str, ...]] = {
    "magnetic": ("ingest", "clean", "diurnal", "reference", "level", "grid", "separate", "derive", "report"),
    "gravity": ("ingest", "clean", "drift", "reference", "level", "grid", "separate", "derive", "report"),
    "observatory": ("ingest", "clean", "reference", "separate", "report"),
}
