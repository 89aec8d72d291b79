"""The smallest magnetic demo (--readings 1000) is a complete survey the whole pipeline runs on."""

from __future__ import annotations

import json

import pandas as pd

from potfield.cli import main
from potfield.demo.magnetic import SURVEY_FILE, plan_lines


def test_plan_sizes_bracket_the_request():
    # the plan's line metres x 10 readings per 7 m come within a factor 1.5 of the request
    for readings in (1_000, 3_000, 9_999):
        plan = plan_lines(readings)
        assert plan["ties"] == 3 and plan["traverses"] >= 5
        length = (plan["traverses"] + plan["ties"]) * (plan["side_m"] + 400.0)
        assert readings / 1.5 < length / 7.0 < readings * 1.5
    assert plan_lines(30_000)["tie_spacing_m"] == 2000.0  # the standard plan is unchanged


def test_demo_1000_readings_runs_every_stage(tmp_path, capsys):
    root = tmp_path / "small"
    assert main(["demo", "magnetic", str(root), "--readings", "1000", "--seed", "2"]) == 0
    raw = pd.read_csv(root / "raw" / SURVEY_FILE)
    assert 1_000 <= len(raw) <= 2_000
    assert main(["run", str(root)]) == 0, capsys.readouterr().err
    manifest = json.loads((root / "out" / "manifest.json").read_text())
    assert all(entry["status"] == "done" for entry in manifest["stages"].values())
    assert manifest["stages"]["level"]["metrics"]
    readings = pd.read_csv(root / "out" / "tables" / "readings.csv")
    assert len(readings) == len(raw)
    assert (root / "out" / "report.html").is_file()
