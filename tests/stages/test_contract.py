"""The stage contract (stages/base.py Contract) as checked by the runner, the one choice of the
value column, and stages that say they skipped or degraded their step."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from potfield import pipeline
from potfield.config import parse_config
from potfield.errors import StageError
from potfield.kinds import KIND_ORDER
from potfield.stages.base import Contract, Stage, StageContext, StageOutput, main_grid_names, value_column


def _stage(contract: Contract) -> Stage:
    return Stage(name="probe", summary="test stage", run=lambda ctx: StageOutput(), contract=contract)


def test_undeclared_dropped_or_missing_columns_are_internal_bugs():
    before = pd.DataFrame({"a": [1.0], "b": [2.0]})
    stage = _stage(Contract(provides_columns=("c",), optional_columns=("flag_*",)))
    ok = StageOutput(table=before.assign(c=3.0, flag_x=False))
    assert pipeline._check_provides(stage, "magnetic", before, ok) == ["c", "flag_x"]
    with pytest.raises(pipeline.ContractError, match="does not declare"):
        pipeline._check_provides(stage, "magnetic", before, StageOutput(table=before.assign(c=1, d=2)))
    with pytest.raises(pipeline.ContractError, match="dropped"):
        pipeline._check_provides(stage, "magnetic", before, StageOutput(table=before[["a"]].assign(c=1)))
    with pytest.raises(pipeline.ContractError, match="did not add"):
        pipeline._check_provides(stage, "magnetic", before, StageOutput(table=before.copy()))
    # a skipped step may leave out what it provides, but still declares what it adds
    assert (
        pipeline._check_provides(stage, "magnetic", before, StageOutput(table=before.copy(), skipped="why"))
        == []
    )
    with pytest.raises(pipeline.ContractError, match="grid"):
        pipeline._check_provides(stage, "magnetic", before, StageOutput(grids={"g": None}))


def test_missing_requirement_names_the_stage_to_run_first(tmp_path):
    level = pipeline.load_stage("level")
    order = KIND_ORDER["magnetic"]
    table = pd.DataFrame({"easting": [0.0], "northing": [0.0]})
    manifest = {"stages": {}}
    with pytest.raises(StageError) as err:
        pipeline._check_requires(
            level, "magnetic", order, list(table.columns), {"ingest": {}}, manifest, tmp_path
        )
    text = str(err.value)
    assert "'level'" in text and "'anomaly'" in text and "--from reference" in text
    manifest = {"stages": {"reference": {"status": "skipped", "summary": "disabled"}}}
    with pytest.raises(StageError, match="skipped: disabled"):
        pipeline._check_requires(
            level, "magnetic", order, list(table.columns), {"ingest": {}}, manifest, tmp_path
        )


def test_every_stage_declares_its_contract_for_every_kind():
    for kind, order in KIND_ORDER.items():
        for name in order:
            stage = pipeline.load_stage(name)
            record = stage.contract.as_record(kind)
            assert set(record) >= {"requires_columns", "provides_columns", "provides_grids"}
    # the grid stage's main grid is the reference stage's anomaly, per kind (one definition)
    grid = pipeline.load_stage("grid").contract
    assert grid.grids("gravity") == ("bouguer_anomaly",) and grid.grids("magnetic") == ("anomaly",)
    assert main_grid_names("gravity")[0] == "bouguer_anomaly"


def test_value_column_is_chosen_in_one_place():
    table = pd.DataFrame(columns=["anomaly", "anomaly_levelled", "anomaly_levelled_micro"])
    assert value_column(table, "magnetic") == "anomaly_levelled"
    assert value_column(table, "magnetic", levelled=False) == "anomaly"
    # the latest earlier record wins (the grid stage's micro-levelled column)
    state = {
        "reference": {"value_column": "anomaly"},
        "level": {"value_column": "anomaly_levelled"},
        "grid": {"value_column": "anomaly_levelled_micro"},
    }
    assert value_column(table, "magnetic", state) == "anomaly_levelled_micro"
    assert (
        value_column(
            table, "magnetic", {"reference": state["reference"], "level": state["level"]}, levelled=False
        )
        == "anomaly"
    )
    gravity = pd.DataFrame(columns=["bouguer_anomaly", "free_air_anomaly"])
    assert value_column(gravity, "gravity") == "bouguer_anomaly"
    assert value_column(pd.DataFrame(columns=["total_field"]), "magnetic") is None


def _ctx(tmp_path, kind, table, **sections):
    config = parse_config({"survey": {"name": "t", "kind": kind}, **sections})

    class _Survey:
        root = tmp_path

        def resolve(self, rel):
            return tmp_path / rel

    return StageContext(config=config, survey=_Survey(), table=table)


def test_level_without_ties_says_it_skipped(tmp_path):
    level = pipeline.load_stage("level")
    table = pd.DataFrame(
        {
            "easting": np.arange(5.0),
            "northing": np.zeros(5),
            "line": "1",
            "line_type": "traverse",
            "anomaly": np.arange(5.0),
        }
    )
    out = level.run(_ctx(tmp_path, "magnetic", table))
    assert out.skipped and "no tie lines" in out.skipped
    assert np.array_equal(out.table["anomaly_levelled"], table["anomaly"])


def test_drift_disabled_says_it_skipped(tmp_path):
    drift = pipeline.load_stage("drift")
    table = pd.DataFrame({"station": ["A"], "reading": [979_000.0]})
    out = drift.run(_ctx(tmp_path, "gravity", table, drift={"enabled": False}))
    assert out.table is None and "final observed gravity" in out.skipped
