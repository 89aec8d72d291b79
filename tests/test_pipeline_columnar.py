"""The columnar runner: a stage gets only the columns its contract ``reads``, each stage's cache
file holds only the columns it added, and cache files of the former whole-table layout are
recomputed. Runs the small synthetic line survey of tests/conftest.py through the level stage
(no grid, to stay fast). The demo surveys of every kind run through the whole pipeline in
tests/e2e/test_demo_*_e2e.py with the same runner, so a column missing from a stage's ``reads``
fails there too (KeyError or a missing column)."""

from __future__ import annotations

import dataclasses
import json
import shutil

import pandas as pd
import pyarrow.parquet as pq
import pytest

from potfield import pipeline
from potfield.kinds import KIND_ORDER
from potfield.stages.base import Contract, Stage, StageOutput

UNTIL = "level"


def _probe(monkeypatch) -> dict:
    """Record the columns of the table each stage is given (None: no table)."""
    seen: dict = {}
    real = pipeline.load_stage

    def load(name):
        stage = real(name)

        def run(ctx, stage=stage):
            seen[stage.name] = None if ctx.table is None else list(ctx.table.columns)
            return stage.run(ctx)

        return dataclasses.replace(stage, run=run)

    monkeypatch.setattr(pipeline, "load_stage", load)
    return seen


def _manifest(root) -> dict:
    return json.loads((root / "out" / "manifest.json").read_text())


def test_each_stage_gets_only_the_columns_it_reads(magnetic_survey, monkeypatch):
    seen = _probe(monkeypatch)
    pipeline.run_survey(magnetic_survey, until=UNTIL)
    manifest = _manifest(magnetic_survey)
    order = KIND_ORDER["magnetic"][: KIND_ORDER["magnetic"].index(UNTIL) + 1]
    assert list(seen) == list(order)
    assert seen["ingest"] is None
    before: list[str] = []
    for name in order:
        contract = pipeline.load_stage(name).contract
        if name != "ingest":
            assert seen[name] == [c for c in before if contract.may_read("magnetic", c)], name
        before += manifest["stages"][name]["columns_added"]
    # e.g. the level stage works on coordinates, lines, flags and the anomaly only
    assert "anomaly" in seen["level"] and "flag_spike" in seen["level"]
    assert "total_field" not in seen["level"] and "source_row" not in seen["level"]
    assert len(seen["level"]) < len(before)


def test_cache_files_hold_only_the_added_columns(magnetic_survey):
    pipeline.run_survey(magnetic_survey, until=UNTIL)
    manifest = _manifest(magnetic_survey)
    cache = magnetic_survey / "out" / "cache"
    header = pd.read_csv(magnetic_survey / "out" / "tables" / "readings.csv", nrows=1).columns
    columns: list[str] = []
    rows = set()
    for name in KIND_ORDER["magnetic"][: KIND_ORDER["magnetic"].index(UNTIL) + 1]:
        added = manifest["stages"][name]["columns_added"]
        if not added:  # a skipped step (diurnal: no base here) adds nothing and has no file
            assert manifest["stages"][name]["status"] == "skipped"
            assert not (cache / f"{name}.parquet").exists()
            continue
        assert pq.read_schema(cache / f"{name}.parquet").names == added
        rows.add(pq.ParquetFile(cache / f"{name}.parquet").metadata.num_rows)
        columns += added
    assert "time" in manifest["stages"]["ingest"]["columns_added"]
    assert manifest["stages"]["clean"]["contract"]["reads"][0] == "line"
    assert list(header) == columns  # readings.csv: every stage's columns, in stage order
    assert len(rows) == 1


def test_old_layout_caches_are_recomputed(magnetic_survey, monkeypatch):
    # a cache made with the former layout has another key: nothing of it is reused
    monkeypatch.setattr(pipeline, "CACHE_LAYOUT", 1)
    pipeline.run_survey(magnetic_survey, until="clean")
    monkeypatch.undo()
    summary = pipeline.run_survey(magnetic_survey, until="clean")
    assert [r.status for r in summary.records] == ["done", "done"]
    summary = pipeline.run_survey(magnetic_survey, until="clean")
    assert [r.status for r in summary.records] == ["cached", "cached"]
    # a whole-table file where the stage's own columns belong is not read as its columns
    cache = magnetic_survey / "out" / "cache"
    whole = pd.concat(
        [pd.read_parquet(cache / "ingest.parquet"), pd.read_parquet(cache / "clean.parquet")], axis=1
    )
    whole.to_parquet(cache / "clean.parquet", index=False)
    summary = pipeline.run_survey(magnetic_survey, until="clean")
    assert [r.status for r in summary.records] == ["cached", "done"]
    assert (
        pq.read_schema(cache / "clean.parquet").names
        == _manifest(magnetic_survey)["stages"]["clean"]["columns_added"]
    )


def _whole_tables(monkeypatch, keep=()) -> None:
    """Every stage but those in ``keep`` given the whole table (``reads`` = None), as before."""
    real = pipeline.load_stage

    def load(name):
        stage = real(name)
        if name in keep:
            return stage
        return dataclasses.replace(stage, contract=dataclasses.replace(stage.contract, reads=None))

    monkeypatch.setattr(pipeline, "load_stage", load)


def _results(root) -> tuple[bytes, dict]:
    manifest = _manifest(root)
    fields = ("status", "metrics", "state", "checks", "notes", "warnings", "degraded", "columns_added")
    stages = {name: {f: entry.get(f) for f in fields} for name, entry in manifest["stages"].items()}
    text = json.dumps(stages, sort_keys=True).replace(str(root), "ROOT")  # the model's path
    return (root / "out" / "tables" / "readings.csv").read_bytes(), text


def test_declared_reads_give_the_results_of_the_whole_table(magnetic_survey, tmp_path, monkeypatch):
    # a column a stage reads only when present (clean: "time" in table) would be skipped
    # silently if left out of its list, so the results are compared with whole-table runs
    copy = tmp_path / "whole"
    shutil.copytree(magnetic_survey, copy)
    pipeline.run_survey(magnetic_survey, until=UNTIL)
    with monkeypatch.context() as patch:
        _whole_tables(patch)
        pipeline.run_survey(copy, until=UNTIL)
    assert _results(magnetic_survey) == _results(copy)
    # the comparison finds a list that misses an optional column: clean without "time"
    real = pipeline.load_stage

    def narrowed(name):
        stage = real(name)
        if name == "clean":
            reads = tuple(c for c in stage.contract.reads if c != "time")
            stage = dataclasses.replace(stage, contract=dataclasses.replace(stage.contract, reads=reads))
        return stage

    monkeypatch.setattr(pipeline, "load_stage", narrowed)
    pipeline.run_survey(magnetic_survey, until="clean", force=True)
    pipeline.run_survey(copy, until="clean")
    assert _results(magnetic_survey) != _results(copy)


def test_rewriting_an_unread_column_or_changing_the_rows_is_a_contract_error():
    received = pd.DataFrame({"a": [1.0, 2.0]})
    stage = Stage(
        "probe", "test stage", lambda ctx: StageOutput(), contract=Contract(optional_columns=("*",))
    )
    with pytest.raises(pipeline.ContractError, match="does not read"):
        pipeline._check_provides(
            stage, "magnetic", received, StageOutput(table=received.assign(b=1.0)), ["a", "b"]
        )
    with pytest.raises(pipeline.ContractError, match="never drop"):
        pipeline._check_provides(stage, "magnetic", received, StageOutput(table=received.iloc[:1]), ["a"])
    narrow = Stage(
        "probe", "test", lambda ctx: None, contract=Contract(requires_columns=("a",), reads=("b",))
    )
    with pytest.raises(pipeline.ContractError, match="does not read"):
        pipeline._stage_columns(narrow, "magnetic", ["a", "b"])


def test_cache_files_of_different_lengths_are_a_contract_error(magnetic_survey):
    pipeline.run_survey(magnetic_survey, until="clean")
    cache = magnetic_survey / "out" / "cache"
    clean = pd.read_parquet(cache / "clean.parquet")
    clean.iloc[:-1].to_parquet(cache / "clean.parquet", index=False)
    with pytest.raises(pipeline.ContractError, match="different numbers of rows"):
        pipeline.run_survey(magnetic_survey, until="diurnal")


def test_every_stage_reads_what_it_requires():
    for kind, order in KIND_ORDER.items():
        for name in order:
            contract = pipeline.load_stage(name).contract
            assert all(contract.may_read(kind, c) for c in contract.requires(kind)), (kind, name)
            assert contract.reads_for(kind) is not None, (kind, name)


@pytest.mark.parametrize(
    ("kind", "readings"), [("magnetic", 1_000), ("gravity", None), ("observatory", None)]
)
def test_demo_surveys_give_the_whole_table_results(kind, readings, tmp_path, monkeypatch):
    # every kind's stages through separate (the last one with a table) on its demo survey
    from potfield.demo import make_demo

    root = make_demo(kind, tmp_path / "declared", readings=readings, seed=2)
    copy = tmp_path / "whole"
    shutil.copytree(root, copy)
    pipeline.run_survey(root, until="separate")
    _whole_tables(monkeypatch)
    pipeline.run_survey(copy, until="separate")
    assert _results(root) == _results(copy)


@pytest.mark.parametrize(("kind", "readings"), [("magnetic", 1_000), ("gravity", None)])
def test_the_report_draws_the_same_maps_from_its_declared_columns(kind, readings, tmp_path, monkeypatch):
    # a figure whose column the report stage was not given is silently left out, so its maps
    # and numbers are compared with a report drawn from the whole table
    from potfield.demo import make_demo

    root = make_demo(kind, tmp_path / "declared", readings=readings, seed=2)
    copy = tmp_path / "whole"
    shutil.copytree(root, copy)
    pipeline.run_survey(root)
    _whole_tables(monkeypatch, keep=tuple(n for n in KIND_ORDER[kind] if n != "report"))
    pipeline.run_survey(copy)
    maps = sorted(p.name for p in (root / "out" / "maps").glob("*.png"))
    assert maps and maps == sorted(p.name for p in (copy / "out" / "maps").glob("*.png"))
    for name in maps:
        assert (root / "out" / "maps" / name).read_bytes() == (copy / "out" / "maps" / name).read_bytes(), (
            name
        )
    assert _results(root) == _results(copy)
