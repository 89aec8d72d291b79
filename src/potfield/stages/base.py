"""The stage interface.

A stage is a pure-ish function ``run(ctx) -> StageOutput``: it reads the readings table the
previous stage produced (``ctx.table``), the survey configuration and the records of earlier
stages (``ctx.state``), and returns the columns it adds, plus tables, grids, spec checks and key
numbers. It never rewrites a column it did not create and never drops or reorders a reading (it
flags it in a ``flag_*`` column), so the runner can keep each stage's added columns in a file of
their own and put a table together by row position. ``ctx.table`` holds only the columns the
stage's contract ``reads``. The runner (potfield.pipeline) writes everything to out/, atomically.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

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
        return cls(
            name,
            value,
            float(tolerance),
            bool(np.isfinite(value) and value <= tolerance),
            unit,
            source,
            "max",
            detail,
        )

    @classmethod
    def at_least(cls, name, value, tolerance, unit="", source="common practice", detail=""):
        value = float(value)
        return cls(
            name,
            value,
            float(tolerance),
            bool(np.isfinite(value) and value >= tolerance),
            unit,
            source,
            "min",
            detail,
        )

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

    config: SurveyConfig
    survey: Survey
    #: Readings table of the earlier stages, only the columns the contract ``reads`` (None
    #: before ingest).
    table: pd.DataFrame | None
    #: Records of earlier stages: ``state[stage_name]`` is that stage's ``StageOutput.state``.
    state: dict[str, dict[str, Any]] = field(default_factory=dict)
    #: Spec tolerances in force: name -> (value, source).
    spec: dict[str, tuple[float, str]] = field(default_factory=dict)
    #: Grids written by earlier stages: name -> DataArray (loaded lazily by the runner).
    grids: dict[str, xr.DataArray] = field(default_factory=dict)
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
    grids: dict[str, xr.DataArray] = field(default_factory=dict)
    checks: list[Check] = field(default_factory=list)
    #: Human-readable notes and warnings for the log and the report.
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    #: Why the stage's step was not applied (e.g. "no base station given: no diurnal
    #: correction"); the runner records the stage as "skipped", loudly. None: it was applied.
    skipped: str | None = None
    #: Parts of the step that were not applied or only partly (e.g. lines left unlevelled); the
    #: runner records them as "degraded" in the manifest and checks.csv.
    degraded: list[str] = field(default_factory=list)


def _per_kind(value, kind: str) -> tuple[str, ...]:
    """A contract field for one survey kind: a tuple, or a dict kind -> tuple ("*": any kind)."""
    if isinstance(value, dict):
        return tuple(value.get(kind, value.get("*", ())))
    return tuple(value)


@dataclass(frozen=True)
class Contract:
    """What a stage needs from earlier stages and what it hands on; the runner checks both.

    Column fields are a tuple of names or a dict survey kind -> tuple (key ``"*"``: every other
    kind). ``requires_columns`` must be in the table the stage receives (the runner says which
    earlier stage provides a missing one). ``provides_columns`` are added whenever the stage
    returns a table; ``optional_columns`` may be added (shell patterns such as ``flag_*`` are
    allowed). A stage that adds a column it did not declare, leaves out one it promised or drops
    a column it received is an internal bug. ``requires_state`` names earlier stages whose
    records (``ctx.state[name]``) the stage reads; ``provides_grids`` / ``provides_tables`` are
    the grids and tables it may write (again possibly per kind). The runner records the contract
    in manifest.json.

    ``reads`` are the table columns the stage reads (names or shell patterns such as ``flag_*``,
    a tuple or a dict kind -> tuple), optional ones included: the runner hands the stage a table
    of just the columns of earlier stages that match, read from their cache files, so a column
    left out of the list is simply not there (a ``KeyError`` or a silently skipped optional
    step). ``None`` (the default) is every column. ``requires_columns`` must be among them.
    """

    requires_columns: tuple[str, ...] | dict[str, tuple[str, ...]] = ()
    provides_columns: tuple[str, ...] | dict[str, tuple[str, ...]] = ()
    optional_columns: tuple[str, ...] | dict[str, tuple[str, ...]] = ()
    requires_state: tuple[str, ...] = ()
    provides_grids: tuple[str, ...] | dict[str, tuple[str, ...]] = ()
    provides_tables: tuple[str, ...] | dict[str, tuple[str, ...]] = ()
    reads: tuple[str, ...] | dict[str, tuple[str, ...]] | None = None

    def requires(self, kind: str) -> tuple[str, ...]:
        return _per_kind(self.requires_columns, kind)

    def provides(self, kind: str) -> tuple[str, ...]:
        return _per_kind(self.provides_columns, kind)

    def optional(self, kind: str) -> tuple[str, ...]:
        return _per_kind(self.optional_columns, kind)

    def grids(self, kind: str) -> tuple[str, ...]:
        return _per_kind(self.provides_grids, kind)

    def tables(self, kind: str) -> tuple[str, ...]:
        return _per_kind(self.provides_tables, kind)

    def reads_for(self, kind: str) -> tuple[str, ...] | None:
        """The column names/patterns the stage reads for a survey kind (None: every column)."""
        return None if self.reads is None else _per_kind(self.reads, kind)

    def may_read(self, kind: str, column: str) -> bool:
        """True when ``column`` is one the stage reads (always, when ``reads`` is None)."""
        from fnmatch import fnmatchcase

        patterns = self.reads_for(kind)
        return patterns is None or any(fnmatchcase(column, pattern) for pattern in patterns)

    def may_add(self, kind: str, column: str) -> bool:
        """True when ``column`` is one the stage declared (provides or optional)."""
        from fnmatch import fnmatchcase

        return column in self.provides(kind) or any(
            fnmatchcase(column, pattern) for pattern in self.optional(kind)
        )

    def as_record(self, kind: str) -> dict[str, list[str] | None]:
        """The contract for one survey kind, JSON-able (for manifest.json)."""
        reads = self.reads_for(kind)
        return {
            "reads": None if reads is None else list(reads),
            "requires_columns": list(self.requires(kind)),
            "provides_columns": list(self.provides(kind)),
            "optional_columns": list(self.optional(kind)),
            "requires_state": list(self.requires_state),
            "provides_grids": list(self.grids(kind)),
            "provides_tables": list(self.tables(kind)),
        }


@dataclass(frozen=True)
class Stage:
    """A named step of the pipeline."""

    name: str
    summary: str
    run: Callable[[StageContext], StageOutput]
    #: survey.toml sections this stage reads (its cache key hashes them).
    sections: tuple[str, ...] = ()
    #: Extra input files this stage reads (bases, DEM, calibration): f(config, survey) -> paths.
    inputs: Callable[[SurveyConfig, Survey], list[Path]] | None = None
    #: Survey kinds for which the stage does something; others pass through with a note.
    kinds: tuple[str, ...] = ("magnetic", "gravity", "observatory")
    #: What the stage requires and provides (checked by the runner).
    contract: Contract = field(default_factory=Contract)


def usable(table: pd.DataFrame) -> np.ndarray:
    """Boolean mask of readings with no ``flag_*`` set (flagged readings stay in the table but
    are excluded from fits)."""
    flags = [c for c in table.columns if c.startswith("flag_")]
    if not flags:
        return np.ones(len(table), dtype=bool)
    return ~table[flags].to_numpy(dtype=bool).any(axis=1)


#: The reduced field the reference stage makes, per survey kind. It is also the name of the grid
#: stage's main grid (the one derive and separate work on). The one definition of both.
ANOMALY_COLUMN = {"magnetic": "anomaly", "gravity": "bouguer_anomaly"}
#: The levelled value (level stage), for both kinds.
LEVELLED_COLUMN = "anomaly_levelled"


def main_grid_names(kind: str) -> tuple[str, ...]:
    """Names of the grid stage's main grid for a survey kind, in order of preference."""
    first = ANOMALY_COLUMN.get(kind, "anomaly")
    return (first,) + tuple(n for n in ANOMALY_COLUMN.values() if n != first)


def value_column(
    table: pd.DataFrame, kind: str, state: dict | None = None, *, levelled: bool = True
) -> str | None:
    """The value column a stage works on; the one place that chooses it.

    The latest earlier stage record ``state[stage]["value_column"]`` naming a column of the
    table wins (reference records its anomaly, level ``anomaly_levelled``, grid the column it
    gridded). Without a record: ``anomaly_levelled`` (when ``levelled``), then the kind's
    anomaly (``ANOMALY_COLUMN``), then the other kind's. None when the table has none of them.

    Parameters
    ----------
    table : pandas.DataFrame
        The readings table the stage received.
    kind : str
        Survey kind.
    state : dict, optional
        ``ctx.state``: records of earlier stages, in run order.
    levelled : bool
        False for the level stage itself (it levels the reference stage's anomaly).
    """
    for record in reversed(list((state or {}).values())):
        name = record.get("value_column") if isinstance(record, dict) else None
        if name and name in table.columns and (levelled or name != LEVELLED_COLUMN):
            return name
    candidates = ((LEVELLED_COLUMN,) if levelled else ()) + main_grid_names(kind)
    for name in candidates:
        if name in table.columns:
            return name
    return None
