"""The staged runner: stage order per survey kind, caching, provenance and outputs.

``run_survey`` runs the stages of a survey's kind in order. Each stage's cache key hashes the
stage name, potfield's source code, the survey.toml sections the stage reads, the checksums of
the files it reads and the key of the stage before it; a stage whose key is unchanged is not
recomputed (its table is loaded from out/cache/). Everything is written atomically; raw/ is only
read.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import platform
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from functools import lru_cache
from importlib import metadata
from pathlib import Path
from typing import Callable

import pandas as pd

from . import __version__
from .errors import PotfieldError, StageError
from .io.atomic import write_csv, write_json, write_parquet  # noqa: F401
from .io.columns import write_table
from .qc.specs import load_spec
from .stages.base import Check, Stage, StageContext, StageOutput
from .survey import Survey, sha256_file

#: Stage order per survey kind (design.md).
KIND_ORDER: dict[str, tuple[str, ...]] = {
    "magnetic": ("ingest", "clean", "diurnal", "reference", "level", "grid", "separate", "derive", "report"),
    "gravity": ("ingest", "clean", "drift", "reference", "level", "grid", "separate", "derive", "report"),
    "observatory": ("ingest", "clean", "reference", "separate", "report"),
}

PACKAGES = ("numpy", "scipy", "pandas", "pyproj", "verde", "harmonica", "boule", "xarray",
            "matplotlib", "pydantic", "pyarrow", "numba", "dask")


def load_stage(name: str) -> Stage:
    """The stage object of module potfield.stages.NAME, or an 'unavailable' placeholder."""
    try:
        module = importlib.import_module(f"potfield.stages.{name}")
    except ModuleNotFoundError as err:
        if err.name and err.name.startswith(f"potfield.stages.{name}"):
            return Stage(name=name, summary="not available yet in this version of potfield", run=None)
        raise
    return module.STAGE


def stages_for(kind: str) -> list[Stage]:
    return [load_stage(name) for name in KIND_ORDER[kind]]


@lru_cache(maxsize=1)
def code_hash() -> str:
    """Hash of potfield's own source files: a code change invalidates the cache."""
    root = Path(__file__).parent
    digest = hashlib.sha256(__version__.encode())
    for path in sorted(root.rglob("*.py")):
        digest.update(str(path.relative_to(root)).encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()


def package_versions() -> dict[str, str]:
    versions = {"python": platform.python_version(), "potfield": __version__}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def select_stages(order: tuple[str, ...], until: str | None = None, only: str | None = None,
                  start: str | None = None) -> list[str]:
    """Names of the stages to run, in order, from the --until/--only/--from options."""
    for option, value in (("--until", until), ("--only", only), ("--from", start)):
        if value is not None and value not in order:
            raise StageError(f"{option} {value}: no such stage for this survey kind",
                             fix=f"use one of: {', '.join(order)}")
    if only:
        return [only]
    first = order.index(start) if start else 0
    last = order.index(until) if until else len(order) - 1
    return list(order[first:last + 1])


@dataclass
class StageRecord:
    name: str
    status: str  # done | cached | unavailable | not-applicable
    seconds: float = 0.0
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


@dataclass
class RunSummary:
    survey: Path
    records: list[StageRecord]
    checks: list[dict]
    manifest: dict

    @property
    def failed_checks(self) -> list[dict]:
        return [c for c in self.checks if c["result"] == "fail"]


def _read_manifest(survey: Survey) -> dict:
    if survey.manifest_path.is_file():
        try:
            return json.loads(survey.manifest_path.read_text())
        except (OSError, json.JSONDecodeError):
            return {}
    return {}


def _stage_key(stage: Stage, config, survey: Survey, previous: str, checksums: dict) -> tuple[str, dict]:
    inputs = {}
    if stage.inputs is not None:
        for path in stage.inputs(config, survey):
            rel = _rel(path, survey)
            if rel not in checksums:
                if not Path(path).is_file():
                    from .errors import InputDataError

                    raise InputDataError("file not found", file=path,
                                         fix="check the file name in survey.toml")
                checksums[rel] = sha256_file(Path(path))
            inputs[rel] = checksums[rel]
    payload = {"stage": stage.name, "code": code_hash(), "config": config.section_hash(*stage.sections),
               "inputs": inputs, "previous": previous}
    return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest(), inputs


def _rel(path, survey: Survey) -> str:
    path = Path(path).resolve()
    try:
        return str(path.relative_to(survey.root))
    except ValueError:
        return str(path)


def write_table_csv(path: Path, table: pd.DataFrame, kind: str = "magnetic") -> Path:
    """The residual table as CSV (potfield.io.columns: ISO 8601 UTC times, rounded floats)."""
    from .io.columns import write_table

    return write_table(path, table, kind)


#: Text columns stored dictionary-encoded in the cache (fast to write), restored as object.
CACHE_TEXT = ("line", "line_type", "source_file", "station", "loop")


def write_cache_table(path: Path, table: pd.DataFrame) -> Path:
    frame = table.copy(deep=False)
    for name in CACHE_TEXT:
        if name in frame and frame[name].dtype == object:
            frame[name] = frame[name].astype("category")
    return write_parquet(path, frame)


def read_cache_table(path: Path) -> pd.DataFrame:
    table = pd.read_parquet(path)
    for name in CACHE_TEXT:
        if name in table and isinstance(table[name].dtype, pd.CategoricalDtype):
            table[name] = table[name].astype(object)
    return table


def run_survey(root: Path | str, *, until: str | None = None, only: str | None = None,
               start: str | None = None, force: bool = False,
               progress: Callable[[str], None] | None = None) -> RunSummary:
    """Run the stages of a survey folder. See the module docstring for caching rules."""
    say = progress or (lambda message: None)
    survey = Survey(Path(root))
    config = survey.load_config()
    spec = load_spec(config, survey)
    order = KIND_ORDER[config.kind]
    selected = select_stages(order, until, only, start)
    with survey.lock():
        survey.make_out()
        old = _read_manifest(survey)
        old_stages = old.get("stages", {}) if old.get("config_kind") == config.kind else {}
        manifest = {
            "potfield_version": __version__,
            "survey": config.survey.name,
            "config_kind": config.kind,
            "config_hash": config.full_hash(),
            "packages": package_versions(),
            "inputs": {},
            "spec": {k: list(v) for k, v in spec.items()},
            "stages": dict(old_stages),
        }
        checksums: dict[str, str] = {}
        table: pd.DataFrame | None = None
        state: dict[str, dict] = {}
        grids: dict = {}
        previous_key = ""
        records: list[StageRecord] = []
        last_index = order.index(selected[-1])
        for index, name in enumerate(order[: last_index + 1]):
            stage = load_stage(name)
            if stage.run is None:
                entry = {"status": "unavailable", "summary": stage.summary}
                if name in selected:
                    manifest["stages"][name] = entry
                    records.append(StageRecord(name, "unavailable", notes=[stage.summary]))
                    say(f"{name}: not available yet in this version (skipped)")
                continue
            if config.kind not in stage.kinds:
                if name in selected:
                    manifest["stages"][name] = {"status": "not-applicable"}
                    records.append(StageRecord(name, "not-applicable"))
                    say(f"{name}: does nothing for {config.kind} surveys")
                continue
            key, inputs = _stage_key(stage, config, survey, previous_key, checksums)
            manifest["inputs"].update(inputs)
            previous_key = key
            cached = old_stages.get(name, {})
            cache_file = survey.cache / f"{name}.parquet"
            # --force recomputes the selected stages only; earlier ones must still be up to date
            is_cached = (not (force and name in selected) and cached.get("key") == key
                         and cached.get("status") == "done"
                         and (not cached.get("table") or cache_file.is_file())
                         and all((survey.grids / f"{g}.nc").is_file() for g in cached.get("grids", [])))
            if name not in selected or is_cached:
                if not is_cached:
                    raise StageError(
                        f"stage '{name}' has no up-to-date result to start '{selected[0]}' from",
                        fix=f"run 'potfield run {survey.root}' (or with --until {selected[0]}) first")
                if cached.get("table"):
                    table = read_cache_table(cache_file)
                state[name] = cached.get("state", {})
                for g in cached.get("grids", []):
                    grids[g] = survey.grids / f"{g}.nc"
                if name in selected:
                    records.append(StageRecord(name, "cached", notes=cached.get("notes", [])))
                    say(f"{name}: unchanged, reused")
                continue
            say(f"{name}: running")
            ctx = StageContext(config=config, survey=survey, table=table, state=state, spec=spec,
                               grids=_LazyGrids(grids), progress=lambda m, n=name: say(f"{n}: {m}"),
                               manifest=manifest)
            started = time.perf_counter()
            output = stage.run(ctx)
            if not isinstance(output, StageOutput):
                raise TypeError(f"stage {name} returned {type(output).__name__}, not StageOutput")
            seconds = time.perf_counter() - started
            entry = _write_stage(survey, config, name, output, state, key, seconds, ctx)
            if output.table is not None:
                table = output.table
            for g in entry["grids"]:
                grids[g] = survey.grids / f"{g}.nc"
            manifest["stages"][name] = entry
            write_json(survey.manifest_path, manifest)  # a later failure keeps this stage's record
            records.append(StageRecord(name, "done", seconds, output.notes, output.warnings))
            say(f"{name}: done in {seconds:.1f} s")
        # Drop records of stages after the last one that ran in this order: they are stale.
        if table is not None:
            write_table_csv(survey.tables / "readings.csv", table, config.kind)
            write_parquet(survey.tables / "readings.parquet", table)
        _write_deliverables(survey, config, state, grids)
        checks = []
        for name in order:
            checks.extend(manifest["stages"].get(name, {}).get("checks", []))
        write_table(survey.tables / "checks.csv", pd.DataFrame(checks, columns=[
            "check", "value", "tolerance", "sense", "unit", "result", "source", "detail", "stage"]),
            config.kind)
        manifest["updated"] = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        manifest["outputs"] = output_checksums(survey)
        write_json(survey.manifest_path, manifest)
    return RunSummary(survey.root, records, checks, manifest)


def _write_deliverables(survey: Survey, config, state: dict, grids: dict) -> None:
    """The data dictionary (tables/columns.csv) and all grids in one file (grids/products.nc)."""
    from .io.columns import write_data_dictionary
    from .io.grids import write_products

    write_data_dictionary(survey.tables, config.kind)
    crs = state.get("ingest", {}).get("crs")
    products = survey.grids / "products.nc"
    if grids and crs:
        write_products(products, dict(grids), crs, title=f"{config.survey.name}: gridded products")


class _LazyGrids(dict):
    """Mapping of grid name -> DataArray, read from out/grids on first access."""

    def __init__(self, paths: dict):
        super().__init__()
        self._paths = dict(paths)

    def __contains__(self, key):
        return key in self._paths

    @property
    def paths(self) -> dict:
        """Grid name -> file path (grids written by earlier stages)."""
        return dict(self._paths)

    def __getitem__(self, key):
        if not dict.__contains__(self, key):
            from .io.grids import read_netcdf

            value = self._paths[key]
            dict.__setitem__(self, key, value if not isinstance(value, Path) else read_netcdf(value))
        return dict.__getitem__(self, key)

    def get(self, key, default=None):
        return self[key] if key in self._paths else default

    def keys(self):
        return self._paths.keys()

    def __iter__(self):
        return iter(self._paths)

    def __len__(self):
        return len(self._paths)

    def items(self):
        return [(k, self[k]) for k in self._paths]


def _write_stage(survey: Survey, config, name: str, output: StageOutput, state: dict, key: str,
                 seconds: float, ctx: StageContext) -> dict:
    from .io.grids import write_geotiff, write_netcdf

    crs = state.get("ingest", {}).get("crs") or output.state.get("crs")
    state[name] = output.state
    if output.table is not None:
        write_cache_table(survey.cache / f"{name}.parquet", output.table)
    for table_name, frame in output.tables.items():
        write_table(survey.tables / f"{table_name}.csv", frame, config.kind)
    for grid_name, grid in output.grids.items():
        grid = grid.rename(grid_name)
        write_netcdf(survey.grids / f"{grid_name}.nc", grid, crs or "EPSG:4326")
        if config.report.geotiff:
            write_geotiff(survey.grids / f"{grid_name}.tif", grid, crs or "EPSG:4326")
    checks = []
    for check in output.checks:
        row = check.as_row() if isinstance(check, Check) else dict(check)
        row["stage"] = name
        checks.append(row)
    return {
        "status": "done",
        "key": key,
        "seconds": round(seconds, 3),
        "finished": datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "table": output.table is not None,
        "metrics": output.metrics,
        "state": output.state,
        "checks": checks,
        "notes": output.notes,
        "warnings": output.warnings,
        "tables": sorted(output.tables),
        "grids": sorted(output.grids),
    }


def output_checksums(survey: Survey) -> dict[str, str]:
    files = {}
    for folder in (survey.tables, survey.grids, survey.maps):
        for path in sorted(folder.glob("*")):
            if path.is_file() and not path.name.startswith("."):
                files[_rel(path, survey)] = sha256_file(path)
    if survey.report_path.is_file():
        files[_rel(survey.report_path, survey)] = sha256_file(survey.report_path)
    return files


def check_survey(root: Path | str) -> dict:
    """Validate config and inputs without processing: what a user would want to know first."""
    from .stages import ingest

    survey = Survey(Path(root))
    config = survey.load_config()
    load_spec(config, survey)
    files = survey.input_files(config)
    ctx = StageContext(config=config, survey=survey, table=None, spec={})
    output = ingest.run(ctx)
    for name in KIND_ORDER[config.kind]:
        stage = load_stage(name)
        if stage.inputs is not None and name != "ingest" and stage.run is not None:
            for path in stage.inputs(config, survey):
                if not Path(path).is_file():
                    from .errors import InputDataError

                    raise InputDataError("file not found", file=path, fix="check the file name in survey.toml")
    table = output.table
    info = {
        "survey": config.survey.name,
        "kind": config.kind,
        "files": {_rel(p, survey): int((table["source_file"] == p.name).sum()) for p in files},
        "readings": len(table),
        "time_span": output.state["time_span"],
        "extent_lonlat": [float(table.longitude.min()), float(table.longitude.max()),
                          float(table.latitude.min()), float(table.latitude.max())],
        "region_m": output.state["region"],
        "input_crs": config.survey.crs,
        "output_crs": output.state["crs_name"],
        "lines": int(table["line"].nunique()),
        "traverse_lines": output.metrics["traverse_lines"],
        "tie_lines": output.metrics["tie_lines"],
        "line_spacing_m": output.state.get("line_spacing_m"),
        "stages": [f"{s.name}{'' if s.run else ' (not available yet)'}" for s in stages_for(config.kind)],
    }
    return info


__all__ = ["KIND_ORDER", "PotfieldError", "RunSummary", "check_survey", "load_stage", "run_survey",
           "select_stages", "stages_for"]
