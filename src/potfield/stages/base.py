"""The stage interface.

A stage is a pure-ish function ``run(ctx) -> StageOutput``: it reads the readings table the
previous stage produced (``ctx.table``), the survey configuration and the records of earlier
stages (``ctx.state``), and returns the columns it adds, plus tables, grids, spec checks and key
numbers. It never rewrites a column it did not create and never drops a reading (it flags it in a
``flag_*`` column). The runner (potfield.pipeline) writes everything to out/, atomically.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable

import numpy as np
import pandas as pd

if TYPE_CHECKING:  # pragma: no cover
    import xarray as xr

    from ..config import SurveyConfig
    from ..survey import Survey


@dataclass
class Check:
    """One spec check: measured value against a tolerance, with the tolerance's source."""

    name: str
    value: float
    tolerance: float
    passed: bool
    unit: str = ""
    source: str = "common practice"
    #: "max" (value <= tolerance passes) or "min" (value >= tolerance passes)
    sense: str = "max"
    detail: str = ""

    @classmethod
    def at_most(cls, name, value, tolerance, unit="", source="common practice", detail=""):
        value = float(value)
        return cls(name, value, float(tolerance), bool(np.isfinite(value) and value <= tolerance),
                   unit, source, "max", detail)

    @classmethod
    def at_least(cls, name, value, tolerance, unit="", source="common practice", detail=""):
        value = float(value)
        return cls(name, value, float(tolerance), bool(np.isfinite(value) and value >= tolerance),
                   unit, source, "min", detail)

    def as_row(self) -> dict[str, Any]:
        return {
            "check": self.name,
            "value": self.value,
            "tolerance": self.tolerance,
            "sense": "<=" if self.sense == "max" else ">=",
            "unit": self.unit,
            "result": "pass" if self.passed else "fail",
            "source": self.source,
            "detail": self.detail,
        }


@dataclass
class StageContext:
    """What a stage gets to work with."""

    config: "SurveyConfig"
    survey: "Survey"
    #: Readings table from the previous stage (None before ingest).
    table: pd.DataFrame | None
    #: Records of earlier stages: ``state[stage_name]`` is that stage's ``StageOutput.state``.
    state: dict[str, dict[str, Any]] = field(default_factory=dict)
    #: Spec tolerances in force: name -> (value, source).
    spec: dict[str, tuple[float, str]] = field(default_factory=dict)
    #: Grids written by earlier stages: name -> DataArray (loaded lazily by the runner).
    grids: dict[str, "xr.DataArray"] = field(default_factory=dict)
    progress: Callable[[str], None] = lambda message: None
    #: The run's manifest so far (stage entries of earlier stages); used by the report stage.
    manifest: dict[str, Any] = field(default_factory=dict)

    def tolerance(self, name: str, default: float, source: str = "common practice") -> tuple[float, str]:
        """The spec value ``name`` (profile, then survey.toml override), or ``default``."""
        return self.spec.get(name, (default, source))


@dataclass
class StageOutput:
    """What a stage hands on. Every field is optional."""

    #: The readings table with this stage's columns added (None: table unchanged).
    table: pd.DataFrame | None = None
    #: Small JSON-able numbers for the manifest and the report (e.g. {"lines": 12}).
    metrics: dict[str, Any] = field(default_factory=dict)
    #: Records for later stages (JSON-able), e.g. {"inclination": 61.2, "declination": -3.1}.
    state: dict[str, Any] = field(default_factory=dict)
    #: Extra tables, written to out/tables/NAME.csv.
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    #: Grids, written to out/grids/NAME.nc (NetCDF-CF with the survey CRS).
    grids: dict[str, "xr.DataArray"] = field(default_factory=dict)
    checks: list[Check] = field(default_factory=list)
    #: Human-readable notes and warnings for the log and the report.
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class Stage:
    """A named step of the pipeline."""

    name: str
    summary: str
    #: The function; None means "not available yet" and the runner says so instead of faking it.
    run: Callable[[StageContext], StageOutput] | None
    #: survey.toml sections this stage reads (its cache key hashes them).
    sections: tuple[str, ...] = ()
    #: Extra input files this stage reads (bases, DEM, calibration): f(config, survey) -> paths.
    inputs: Callable[["SurveyConfig", "Survey"], list[Path]] | None = None
    #: Survey kinds for which the stage does something; others pass through with a note.
    kinds: tuple[str, ...] = ("magnetic", "gravity", "observatory")


def passthrough(reason: str) -> Callable[[StageContext], StageOutput]:
    """A stage body that does nothing and says why (e.g. no tie lines in a ground survey)."""

    def run(ctx: StageContext) -> StageOutput:
        return StageOutput(notes=[reason])

    return run


def usable(table: pd.DataFrame) -> np.ndarray:
    """Boolean mask of readings with no ``flag_*`` set (flagged readings stay in the table but
    are excluded from fits)."""
    flags = [c for c in table.columns if c.startswith("flag_")]
    if not flags:
        return np.ones(len(table), dtype=bool)
    return ~table[flags].to_numpy(dtype=bool).any(axis=1)


def best_value_column(table: pd.DataFrame, candidates=("anomaly_levelled", "anomaly")) -> str:
    """The most processed value column present (levelled anomaly, else anomaly)."""
    for name in candidates:
        if name in table.columns:
            return name
    raise KeyError(f"none of {candidates} in the readings table")
