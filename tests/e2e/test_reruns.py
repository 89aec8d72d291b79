"""Partial reruns keep manifest.json, readings.csv and checks.csv describing the same stages.

A run that stops before the end (--until, --only) marks every later stage "stale"; the
manifest's output checksums are always those of the files on disk; contradictory stage ranges
are refused with one line; ``potfield report`` updates the report's checksum. Uses the small
synthetic line survey of tests/conftest.py (no grid stage, to stay fast).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq

from potfield.cli import main


def _manifest(root: Path) -> dict:
    return json.loads((root / "out" / "manifest.json").read_text())


def _assert_manifest_matches_disk(root: Path) -> dict:
    """Every output file is in the manifest with its SHA-256, and nothing else is."""
    manifest = _manifest(root)
    out = root / "out"
    on_disk = {
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
        for folder in ("tables", "grids", "maps")
        for p in sorted((out / folder).glob("*"))
        if p.is_file() and not p.name.startswith(".")
    }
    if (out / "report.html").is_file():
        on_disk["out/report.html"] = hashlib.sha256((out / "report.html").read_bytes()).hexdigest()
    assert manifest["outputs"] == on_disk
    return manifest


def _readings_columns(root: Path) -> set[str]:
    return set(pd.read_csv(root / "out" / "tables" / "readings.csv", nrows=2).columns)


def _cache_columns(root: Path, stage: str) -> set[str]:
    """Columns of the table of ``stage``: those of its own and the earlier stages' cache files
    (each file holds only the columns its stage added)."""
    from potfield.kinds import KIND_ORDER

    order = KIND_ORDER["magnetic"]
    columns: set[str] = set()
    for name in order[: order.index(stage) + 1]:
        path = root / "out" / "cache" / f"{name}.parquet"
        if path.is_file():
            columns |= set(pq.read_schema(path).names)
    return columns


def _one_line_error(capsys, argv) -> str:
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def test_until_after_a_longer_run_marks_later_stages_stale(magnetic_survey, capsys):
    root = str(magnetic_survey)
    assert main(["run", root, "--until", "reference"]) == 0
    full = _assert_manifest_matches_disk(magnetic_survey)
    assert full["stages"]["reference"]["status"] == "done"
    assert "anomaly" in _readings_columns(magnetic_survey)

    assert main(["run", root, "--until", "clean"]) == 0
    assert "diurnal, reference: marked stale" in capsys.readouterr().out
    manifest = _assert_manifest_matches_disk(magnetic_survey)
    # the later stages are stale, and readings.csv is exactly the clean stage's table
    assert manifest["stages"]["diurnal"]["status"] == "stale"
    assert manifest["stages"]["reference"]["status"] == "stale"
    assert manifest["stages"]["clean"]["status"] == "done"
    assert _readings_columns(magnetic_survey) == _cache_columns(magnetic_survey, "clean")
    assert "anomaly" not in _readings_columns(magnetic_survey)
    checks = pd.read_csv(magnetic_survey / "out" / "tables" / "checks.csv")
    assert set(checks["stage"]) <= {"ingest", "clean"}  # stale stages' rows are not current

    # an unchanged stale stage comes back without being recomputed
    assert main(["run", root, "--until", "reference"]) == 0
    out = capsys.readouterr().out
    assert "reference: unchanged, reused" in out
    manifest = _assert_manifest_matches_disk(magnetic_survey)
    assert manifest["stages"]["reference"]["status"] == "done"
    assert "anomaly" in _readings_columns(magnetic_survey)


def test_only_with_force_marks_later_stages_stale(magnetic_survey, capsys):
    root = str(magnetic_survey)
    assert main(["run", root, "--until", "reference"]) == 0
    assert main(["run", root, "--only", "clean", "--force"]) == 0
    manifest = _assert_manifest_matches_disk(magnetic_survey)
    assert manifest["stages"]["reference"]["status"] == "stale"
    assert "not in readings.csv" in manifest["stages"]["reference"]["stale_reason"]
    assert _readings_columns(magnetic_survey) == _cache_columns(magnetic_survey, "clean")


def test_until_ingest_with_force(magnetic_survey, capsys):
    root = str(magnetic_survey)
    assert main(["run", root, "--until", "clean"]) == 0
    assert main(["run", root, "--until", "ingest", "--force"]) == 0
    manifest = _assert_manifest_matches_disk(magnetic_survey)
    assert manifest["stages"]["clean"]["status"] == "stale"
    assert "flag_spike" not in _readings_columns(magnetic_survey)
    checks = pd.read_csv(magnetic_survey / "out" / "tables" / "checks.csv")
    assert "clean" not in set(checks["stage"])


def test_contradictory_ranges_are_refused(magnetic_survey, capsys):
    root = str(magnetic_survey)
    line = _one_line_error(capsys, ["run", root, "--from", "reference", "--until", "clean"])
    assert "--from reference comes after --until clean" in line
    line = _one_line_error(capsys, ["run", root, "--only", "clean", "--until", "reference"])
    assert "--only clean cannot be combined with --until" in line
    line = _one_line_error(capsys, ["run", root, "--only", "clean", "--from", "ingest"])
    assert "--from" in line
    assert not (magnetic_survey / "out" / "manifest.json").exists()  # nothing was run


def test_report_command_updates_the_report_checksum(magnetic_survey, capsys):
    root = str(magnetic_survey)
    assert main(["run", root, "--until", "clean"]) == 0
    before = _assert_manifest_matches_disk(magnetic_survey)
    assert "out/report.html" not in before["outputs"]
    assert main(["report", root]) == 0
    after = _assert_manifest_matches_disk(magnetic_survey)
    assert "out/report.html" in after["outputs"]
    assert any(k.startswith("out/maps/") for k in after["outputs"])
    assert after["stages"] == before["stages"]  # only the checksums change


def test_a_failing_stage_leaves_out_consistent(magnetic_survey, capsys):
    root = str(magnetic_survey)
    assert main(["run", root, "--until", "reference"]) == 0
    # a reference date outside IGRF-14 makes the reference stage fail with a one-line error
    path = magnetic_survey / "survey.toml"
    path.write_text(path.read_text().replace("[reference]\n", '[reference]\nigrf_date = "1850-01-01"\n', 1))
    line = _one_line_error(capsys, ["run", root, "--until", "reference"])
    assert "igrf_date" in line
    manifest = _assert_manifest_matches_disk(magnetic_survey)
    assert manifest["stages"]["reference"]["status"] == "stale"
    assert "anomaly" not in _readings_columns(magnetic_survey)
