"""The staged runner: stage order per survey kind, caching, provenance and outputs.

``run_survey`` runs the stages of a survey's kind in order. Each stage's cache key hashes the
stage name, potfield's source code, the survey.toml sections the stage reads, the checksums of
the files it reads, the cache layout and the key of the stage before it; a stage whose key is
unchanged is not recomputed. Everything is written atomically; raw/ is only read.

The readings table lives on disk, by column: out/cache/STAGE.parquet holds only the columns that
stage added (the manifest's ``columns_added``), and a stage gets a table of just the columns its
contract ``reads``, read from the files of the stages that added them and joined by row position.
readings.csv and readings.parquet are streamed from those files a piece at a time.

Every stage declares a :class:`potfield.stages.base.Contract`: the runner checks its required
columns and earlier records before running it, and what it added after (an undeclared or dropped
column is an internal bug). A stage that says its step was skipped or degraded is recorded so in
the manifest and checks.csv. A run that stops before the last stage marks the later stages
"stale": readings.csv, checks.csv and the manifest always describe the same stages, and the
manifest's output checksums are those of the files on disk.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import platform
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from fnmatch import fnmatchcase
from importlib import metadata
from pathlib import Path

import pandas as pd

from . import __version__
from .errors import InputDataError, PotfieldError, StageError
from .io.atomic import write_json
from .io.columns import write_table
from .io.tables import (
    CACHE_LAYOUT,
    CURRENT,
    RowCountMismatch,
    manifest_layout,
    read_cache_columns,
    release_memory,
    write_cache_table,
    write_readings,
)
from .kinds import KIND_ORDER
from .qc.specs import load_spec
from .stages.base import Check, Stage, StageContext, StageOutput
from .survey import Survey, sha256_file

PACKAGES = (
    "numpy",
    "scipy",
    "pandas",
    "pyproj",
    "verde",
    "harmonica",
    "boule",
    "xarray",
    "matplotlib",
    "pydantic",
    "pyarrow",
    "numba",
    "dask",
)

#: Columns of out/tables/checks.csv. Spec checks have result pass/fail; a skipped or degraded
#: step is a row with result "skipped" / "degraded" and the reason in ``detail``.
CHECK_COLUMNS = ["check", "value", "tolerance", "sense", "unit", "result", "source", "detail", "stage"]


class ContractError(RuntimeError):
    """A stage broke its declared contract (an internal bug, not a user's mistake)."""


def load_stage(name: str) -> Stage:
    """The stage object of module potfield.stages.NAME."""
    return importlib.import_module(f"potfield.stages.{name}").STAGE


def stages_for(kind: str) -> list[Stage]:
    return [load_stage(name) for name in KIND_ORDER[kind]]


def code_hash(stage: str) -> str:
    """Hash of the potfield source files stage ``stage`` imports (potfield.codedeps): a change
    to the code a stage runs invalidates its cache, a change elsewhere does not."""
    from .codedeps import code_hash as module_hash

    return module_hash(f"potfield.stages.{stage}", __version__)


def package_versions() -> dict[str, str]:
    versions = {"python": platform.python_version(), "potfield": __version__}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def select_stages(
    order: tuple[str, ...], until: str | None = None, only: str | None = None, start: str | None = None
) -> list[str]:
    """Names of the stages to run, in order, from the --until/--only/--from options.

    Contradictory choices are refused: --only with --until or --from, and --from after --until.
    """
    for option, value in (("--until", until), ("--only", only), ("--from", start)):
        if value is not None and value not in order:
            raise StageError(
                f"{option} {value}: no such stage for this survey kind", fix=f"use one of: {', '.join(order)}"
            )
    if only and (until or start):
        other = "--until" if until else "--from"
        raise StageError(
            f"--only {only} cannot be combined with {other}",
            fix="use --only alone, or --from/--until for a range of stages",
        )
    if only:
        return [only]
    first = order.index(start) if start else 0
    last = order.index(until) if until else len(order) - 1
    if first > last:
        raise StageError(
            f"--from {start} comes after --until {until} in the stage order",
            fix=f"choose a range in the order {' -> '.join(order)}",
        )
    return list(order[first : last + 1])


@dataclass
class StageRecord:
    name: str
    status: str  # done | cached | skipped | not-applicable
    seconds: float = 0.0
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    #: Why the step was skipped (None: applied) and what was only partly applied.
    skipped: str | None = None
    degraded: list[str] = field(default_factory=list)


@dataclass
class RunSummary:
    survey: Path
    records: list[StageRecord]
    checks: list[dict]
    manifest: dict
    #: Skipped and degraded steps of the current results: rows as in checks.csv.
    steps: list[dict] = field(default_factory=list)

    @property
    def failed_checks(self) -> list[dict]:
        return [c for c in self.checks if c["result"] == "fail"]

    @property
    def skipped_steps(self) -> list[dict]:
        return [s for s in self.steps if s["result"] == "skipped"]

    @property
    def degraded_steps(self) -> list[dict]:
        return [s for s in self.steps if s["result"] == "degraded"]


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
            rel = survey.rel(path)
            if rel not in checksums:
                if not Path(path).is_file():
                    raise InputDataError(
                        "file not found", file=path, fix="check the file name in survey.toml"
                    )
                checksums[rel] = sha256_file(Path(path))
            inputs[rel] = checksums[rel]
    payload = {
        "stage": stage.name,
        "code": code_hash(stage.name),
        "config": config.section_hash(*stage.sections),
        "inputs": inputs,
        "previous": previous,
        "layout": CACHE_LAYOUT,
    }
    return hashlib.sha256(json.dumps(payload, sort_keys=True).encode()).hexdigest(), inputs


def _rel(path, survey: Survey) -> str:
    return survey.rel(path)


def _provider(order: tuple[str, ...], before: str, column: str, kind: str) -> str | None:
    """The earlier stage whose contract provides ``column``."""
    for name in order[: order.index(before)]:
        stage = load_stage(name)
        if kind not in stage.kinds:
            continue
        if column in stage.contract.provides(kind) or (
            name != "ingest" and stage.contract.may_add(kind, column)
        ):  # ingest's extra
            return name  # columns are mapped ones

    return None


def _check_requires(
    stage: Stage,
    kind: str,
    order: tuple[str, ...],
    available: list[str],
    state: dict,
    manifest: dict,
    root: Path,
) -> None:
    """A StageError naming the stage and what to run first when a requirement is missing
    (``available``: the columns of the earlier stages)."""
    contract = stage.contract
    columns = set(available)
    missing = [c for c in contract.requires(kind) if c not in columns]
    for column in missing:
        provider = _provider(order, stage.name, column, kind)
        if provider is None:
            raise StageError(
                f"stage '{stage.name}' needs the column '{column}', which no earlier stage provides",
                key=f"input.columns.{column}",
                fix=f"map an input column to '{column}' under [input.columns]",
            )
        entry = manifest["stages"].get(provider, {})
        why = f" (it was skipped: {entry.get('summary')})" if entry.get("status") == "skipped" else ""
        raise StageError(
            f"stage '{stage.name}' needs the column '{column}' of stage '{provider}'{why}",
            fix=f"run 'potfield run {root} --from {provider}' first",
        )
    for name in contract.requires_state:
        if name in KIND_ORDER[kind] and name not in state:
            raise StageError(
                f"stage '{stage.name}' needs the record of stage '{name}'",
                fix=f"run 'potfield run {root} --until {name}' first",
            )


def _stage_columns(stage: Stage, kind: str, available) -> list[str]:
    """The columns of ``available`` (in their order) the stage reads; a ContractError when a
    column it requires is not among those it reads."""
    contract = stage.contract
    unread = [c for c in contract.requires(kind) if not contract.may_read(kind, c)]
    if unread:
        raise ContractError(f"stage '{stage.name}' requires column(s) {unread} it does not read")
    return [c for c in available if contract.may_read(kind, c)]


def _read_table(layout: dict[str, Path], columns=None) -> pd.DataFrame:
    """The table of ``layout`` (only ``columns``); a ContractError when its cache files differ
    in length (a stage dropped or added readings)."""
    try:
        return read_cache_columns(layout, columns)
    except RowCountMismatch as err:
        raise ContractError(str(err)) from None


def _check_provides(
    stage: Stage,
    kind: str,
    before: pd.DataFrame | None,
    output: StageOutput,
    existing=(),
) -> list[str]:
    """The columns the stage added; a ContractError when it broke its contract.

    ``before`` is the table the stage received (its ``reads`` columns), ``existing`` every
    column of the earlier stages: a stage may not drop a column it received, add one it did not
    declare, rewrite one it was not given, or change the number of readings.
    """
    contract = stage.contract
    for what, names, declared in (
        ("grid", output.grids, contract.grids(kind)),
        ("table", output.tables, contract.tables(kind)),
    ):
        extra = [n for n in names if not any(fnmatchcase(n, p) for p in declared)]
        if extra:
            raise ContractError(
                f"stage '{stage.name}' wrote {what}(s) {extra} it does not declare "
                f"(declared: {list(declared)})"
            )
    if output.table is None:
        return []
    received = list(before.columns) if before is not None else []
    produced = set(output.table.columns)
    dropped = [c for c in received if c not in produced]
    if dropped:
        raise ContractError(f"stage '{stage.name}' dropped column(s) {dropped}")
    if before is not None and len(output.table) != len(before):
        raise ContractError(
            f"stage '{stage.name}' returned {len(output.table)} readings for {len(before)} "
            "(stages flag readings, they never drop or add any)"
        )
    added = [c for c in output.table.columns if c not in set(received)]
    rewritten = [c for c in added if c in set(existing)]
    if rewritten:
        raise ContractError(
            f"stage '{stage.name}' wrote column(s) {rewritten} of an earlier stage it does not read"
        )
    undeclared = [c for c in added if not contract.may_add(kind, c)]
    if undeclared:
        raise ContractError(f"stage '{stage.name}' added column(s) {undeclared} it does not declare")
    promised = [c for c in contract.provides(kind) if c not in produced]
    if promised and not output.skipped:
        raise ContractError(f"stage '{stage.name}' did not add the column(s) {promised} it provides")
    return added


def _step_rows(name: str, entry: dict) -> list[dict]:
    """checks.csv rows of a stage's skipped / degraded steps."""
    rows = []
    if entry.get("status") == "skipped":
        rows.append(
            {
                "check": f"step {name}",
                "value": float("nan"),
                "tolerance": float("nan"),
                "sense": "",
                "unit": "",
                "result": "skipped",
                "source": "potfield",
                "detail": entry.get("summary", ""),
                "stage": name,
            }
        )
    for text in entry.get("degraded", []):
        rows.append(
            {
                "check": f"step {name}",
                "value": float("nan"),
                "tolerance": float("nan"),
                "sense": "",
                "unit": "",
                "result": "degraded",
                "source": "potfield",
                "detail": text,
                "stage": name,
            }
        )
    return rows


def _mark_stale(manifest: dict, names, reason: str) -> None:
    """Mark the records of ``names`` stale: their results are not in readings.csv/checks.csv."""
    for name in names:
        entry = manifest["stages"].get(name)
        if not entry or entry.get("status") in ("stale", "not-applicable"):
            continue
        entry["status_before_stale"] = entry.get("status")
        entry["status"] = "stale"
        entry["stale_reason"] = reason


def run_survey(
    root: Path | str,
    *,
    until: str | None = None,
    only: str | None = None,
    start: str | None = None,
    force: bool = False,
    progress: Callable[[str], None] | None = None,
) -> RunSummary:
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
            "stages": {k: dict(v) for k, v in old_stages.items()},
            "outputs": old.get("outputs", {}),
        }
        hashes: dict = {}
        checksums: dict[str, str] = {}
        state: dict[str, dict] = {}
        grids: dict = {}
        previous_key = ""
        records: list[StageRecord] = []
        last_index = order.index(selected[-1])
        later = order[last_index + 1 :]
        stamp = datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        stale_reason = (
            f"the run of {stamp} stopped after '{selected[-1]}': these results are "
            "not in readings.csv/checks.csv; run again without --until/--only to "
            "bring them back (unchanged ones are reused)"
        )
        for index, name in enumerate(order[: last_index + 1]):
            stage = load_stage(name)
            if config.kind not in stage.kinds:
                if name in selected:
                    manifest["stages"][name] = {"status": "not-applicable"}
                    records.append(StageRecord(name, "not-applicable"))
                    say(f"{name}: does nothing for {config.kind} surveys")
                continue
            key, inputs = _stage_key(stage, config, survey, previous_key, checksums)
            manifest["inputs"].update(inputs)
            previous_key = key
            cached = manifest["stages"].get(name, {})
            status = (
                cached.get("status_before_stale") if cached.get("status") == "stale" else cached.get("status")
            )
            cache_file = survey.cache / f"{name}.parquet"
            # --force recomputes the selected stages only; earlier ones must still be up to date
            is_cached = (
                not (force and name in selected)
                and cached.get("key") == key
                and status in CURRENT
                and _cache_file_ok(cache_file, cached.get("columns_added") or [])
                and all((survey.grids / f"{g}.nc").is_file() for g in cached.get("grids", []))
            )
            if name not in selected or is_cached:
                if not is_cached:
                    raise StageError(
                        f"stage '{name}' has no up-to-date result to start '{selected[0]}' from",
                        fix=f"run 'potfield run {survey.root}' (or with --until {selected[0]}) first",
                    )
                if cached.get("status") == "stale":  # an unchanged result comes back
                    cached["status"] = cached.pop("status_before_stale", "done")
                    cached.pop("stale_reason", None)
                state[name] = cached.get("state", {})
                for g in cached.get("grids", []):
                    grids[g] = survey.grids / f"{g}.nc"
                if name in selected:
                    records.append(
                        StageRecord(
                            name,
                            "cached",
                            notes=cached.get("notes", []),
                            skipped=cached.get("summary") if status == "skipped" else None,
                            degraded=list(cached.get("degraded", [])),
                        )
                    )
                    say(f"{name}: unchanged, reused" + _loud(cached))
                continue
            # Whatever follows this stage was made from results about to change: stale until rerun.
            _mark_stale(manifest, order[index + 1 :], stale_reason)
            # the columns of the stages before this one, each in the cache file of its stage
            layout = manifest_layout(survey.cache, manifest["stages"], order[:index])
            _check_requires(stage, config.kind, order, list(layout), state, manifest, survey.root)
            table = _read_table(layout, _stage_columns(stage, config.kind, layout)) if layout else None
            say(f"{name}: running")
            ctx = StageContext(
                config=config,
                survey=survey,
                table=table,
                state=state,
                spec=spec,
                grids=_LazyGrids(grids),
                progress=lambda m, n=name: say(f"{n}: {m}"),
                manifest=manifest,
            )
            started = time.perf_counter()
            try:
                output = stage.run(ctx)
                if not isinstance(output, StageOutput):
                    raise TypeError(f"stage {name} returned {type(output).__name__}, not StageOutput")
                added = _check_provides(stage, config.kind, table, output, layout)
                seconds = time.perf_counter() - started
                entry = _write_stage(survey, config, name, output, added, state, key, seconds, ctx)
            except BaseException:
                # out/ keeps describing what is current: the stages before this one
                _mark_stale(
                    manifest,
                    order[index:],
                    f"stage '{name}' failed in the run of {stamp}; these results are not current",
                )
                try:
                    _finish(survey, config, manifest, order[:index], hashes, state, grids)
                except Exception:  # noqa: BLE001, S110  (the original error matters more)
                    pass
                raise
            entry["contract"] = stage.contract.as_record(config.kind)
            entry["columns_added"] = added
            for g in entry["grids"]:
                grids[g] = survey.grids / f"{g}.nc"
            manifest["stages"][name] = entry
            # a later failure keeps this stage's record; the checksums follow the files written
            manifest["outputs"] = survey.output_checksums(hashes)
            write_json(survey.manifest_path, manifest)
            records.append(
                StageRecord(
                    name,
                    entry["status"],
                    seconds,
                    output.notes,
                    output.warnings,
                    output.skipped,
                    list(output.degraded),
                )
            )
            verb = "skipped" if entry["status"] == "skipped" else "done"
            say(f"{name}: {verb} in {seconds:.1f} s" + _loud(entry))
            # the table is on disk now: free it before the next stage reads its columns
            table = output = ctx = None
            release_memory()
        _mark_stale(manifest, later, stale_reason)
        stale = [n for n in later if manifest["stages"].get(n, {}).get("status") == "stale"]
        if stale:
            say(
                f"{', '.join(stale)}: marked stale (results not in readings.csv/checks.csv; "
                "run again without --until/--only to bring them back)"
            )
        checks, steps = _finish(survey, config, manifest, order[: last_index + 1], hashes, state, grids)
    return RunSummary(survey.root, records, checks, manifest, steps)


def _finish(
    survey: Survey,
    config,
    manifest: dict,
    current,
    hashes: dict,
    state: dict,
    grids: dict,
) -> tuple[list[dict], list[dict]]:
    """Write readings.csv and readings.parquet (the table of the ``current`` stages, streamed from
    their cache files), checks.csv (the checks and skipped/degraded steps of the ``current``
    stages), the data dictionary, the multi-variable products file of the current grids, and the
    manifest with the outputs' checksums."""
    layout = manifest_layout(survey.cache, manifest["stages"], current)
    if layout:
        try:
            write_readings(
                survey.tables / "readings.csv", survey.tables / "readings.parquet", layout, config.kind
            )
        except RowCountMismatch as err:
            raise ContractError(str(err)) from None
    _write_deliverables(survey, config, state, grids)
    checks, steps = [], []
    for name in current:
        entry = manifest["stages"].get(name, {})
        checks.extend(entry.get("checks", []))
        steps.extend(_step_rows(name, entry))
    write_table(
        survey.tables / "checks.csv", pd.DataFrame(checks + steps, columns=CHECK_COLUMNS), config.kind
    )
    manifest["updated"] = datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    manifest["outputs"] = survey.output_checksums(hashes)
    write_json(survey.manifest_path, manifest)
    return checks, steps


def _write_deliverables(survey: Survey, config, state: dict, grids: dict) -> None:
    """The data dictionary (tables/columns.csv) and the current grids in one file
    (grids/products.nc; removed when no grid is current)."""
    from .io.columns import write_data_dictionary
    from .io.grids import write_products

    write_data_dictionary(survey.tables, config.kind)
    crs = state.get("ingest", {}).get("crs")
    products = survey.grids / "products.nc"
    if grids and crs:
        write_products(products, dict(grids), crs, title=f"{config.survey.name}: gridded products")
    elif products.is_file():
        products.unlink()


def _cache_file_ok(path: Path, columns: list[str]) -> bool:
    """True when the cache file holds exactly ``columns`` (no file needed when there are none)."""
    if not columns:
        return True
    if not path.is_file():
        return False
    import pyarrow.parquet as pq

    try:
        return pq.read_schema(path).names == list(columns)
    except (OSError, ValueError):  # unreadable (pyarrow's errors derive from these): recompute
        return False


def _loud(entry: dict) -> str:
    """' (SKIPPED: why)' / ' (DEGRADED: what)' for the progress line of a stage."""
    text = ""
    if entry.get("status") == "skipped" or entry.get("status_before_stale") == "skipped":
        text += f" -- SKIPPED: {entry.get('summary', '')}"
    if entry.get("degraded"):
        text += f" -- DEGRADED: {'; '.join(entry['degraded'])}"
    return text


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


def _write_stage(
    survey: Survey,
    config,
    name: str,
    output: StageOutput,
    added: list[str],
    state: dict,
    key: str,
    seconds: float,
    ctx: StageContext,
) -> dict:
    from .io.grids import write_geotiff, write_netcdf

    crs = state.get("ingest", {}).get("crs") or output.state.get("crs")
    state[name] = output.state
    cache_file = survey.cache / f"{name}.parquet"
    if added:  # only the columns this stage added; the others are in earlier stages' files
        write_cache_table(cache_file, output.table[added])
    else:
        cache_file.unlink(missing_ok=True)
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
    entry = {
        "status": "skipped" if output.skipped else "done",
        "key": key,
        "seconds": round(seconds, 3),
        "finished": datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "table": output.table is not None,
        "metrics": output.metrics,
        "state": output.state,
        "checks": checks,
        "notes": output.notes,
        "warnings": output.warnings,
        "tables": sorted(output.tables),
        "grids": sorted(output.grids),
        "degraded": list(output.degraded),
    }
    if output.skipped:
        entry["summary"] = output.skipped  # shown by the report for a stage that is not "done"
    return entry


def output_checksums(survey: Survey) -> dict[str, str]:
    return survey.output_checksums()


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
        if stage.inputs is not None and name != "ingest":
            for path in stage.inputs(config, survey):
                if not Path(path).is_file():
                    raise InputDataError(
                        "file not found", file=path, fix="check the file name in survey.toml"
                    )
    table = output.table
    info = {
        "survey": config.survey.name,
        "kind": config.kind,
        "files": {_rel(p, survey): int((table["source_file"] == p.name).sum()) for p in files},
        "readings": len(table),
        "time_span": output.state["time_span"],
        "extent_lonlat": [
            float(table.longitude.min()),
            float(table.longitude.max()),
            float(table.latitude.min()),
            float(table.latitude.max()),
        ],
        "region_m": output.state["region"],
        "input_crs": config.survey.crs,
        "output_crs": output.state["crs_name"],
        "lines": int(table["line"].nunique()),
        "traverse_lines": output.metrics["traverse_lines"],
        "tie_lines": output.metrics["tie_lines"],
        "line_spacing_m": output.state.get("line_spacing_m"),
        "stages": [s.name for s in stages_for(config.kind)],
    }
    return info


__all__ = [
    "KIND_ORDER",
    "PotfieldError",
    "RunSummary",
    "check_survey",
    "load_stage",
    "run_survey",
    "select_stages",
    "stages_for",
]
