"""End to end through the command line: new -> raw files -> check -> run --until clean.

Also the frame's promises: raw/ never written (checksums before and after), rerun skips
unchanged stages with identical tables, --force recomputes, the lock, and one-line errors.
"""

from __future__ import annotations

import gzip
import hashlib
import json
from pathlib import Path

import pandas as pd

from potfield.cli import main


def _digest(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


def _error(capsys, argv) -> str:
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    return lines[0]


def test_new_check_run_clean(magnetic_survey, capsys):
    root = magnetic_survey
    assert (root / "raw" / "README.md").is_file()
    before = _digest(root / "raw")
    assert main(["check", str(root)]) == 0
    out = capsys.readouterr().out
    assert "readings" in out and "UTM zone 54S" in out and "tie" in out
    assert main(["run", str(root), "--until", "clean"]) == 0
    tables = root / "out" / "tables"
    readings = pd.read_csv(tables / "readings.csv")
    assert {
        "time",
        "easting",
        "northing",
        "line_type",
        "flag_spike",
        "fourth_difference",
        "source_row",
    } <= set(readings.columns)
    assert (readings["line_type"] == "tie").any()
    manifest = json.loads((root / "out" / "manifest.json").read_text())
    assert manifest["stages"]["clean"]["status"] == "done"
    assert "lines.csv" in manifest["inputs"].get("raw/lines.csv", "") or manifest["inputs"]
    assert manifest["packages"]["numpy"]
    assert set(manifest["outputs"]) >= {"out/tables/readings.csv", "out/tables/checks.csv"}
    assert _digest(root / "raw") == before  # raw/ is never written

    first = (tables / "readings.csv").read_bytes()
    assert main(["run", str(root), "--until", "clean"]) == 0
    out = capsys.readouterr().out
    assert "clean: unchanged, reused" in out
    assert (tables / "readings.csv").read_bytes() == first
    assert main(["run", str(root), "--until", "clean", "--force"]) == 0
    assert "clean: done" in capsys.readouterr().out
    assert (tables / "readings.csv").read_bytes() == first
    assert _digest(root / "raw") == before


def test_only_needs_earlier_stages(magnetic_survey, capsys):
    msg = _error(capsys, ["run", str(magnetic_survey), "--only", "clean"])
    assert "no up-to-date result" in msg and "ingest" in msg


def test_only_with_force_recomputes_only_that_stage(magnetic_survey, capsys):
    # Common practice for staged processing: --force redoes the chosen stage, it does not
    # invalidate the up-to-date stages it starts from.
    assert main(["run", str(magnetic_survey), "--until", "clean"]) == 0
    capsys.readouterr()
    assert main(["run", str(magnetic_survey), "--only", "clean", "--force"]) == 0
    out = capsys.readouterr().out
    assert "clean: done" in out and "ingest: running" not in out


def test_stages_lists_every_kind(capsys):
    assert main(["stages"]) == 0
    out = capsys.readouterr().out
    for kind in ("magnetic:", "gravity:", "observatory:"):
        assert kind in out
    assert "ingest" in out and "clean" in out


def test_lock_refuses_second_run(magnetic_survey, capsys):
    import os

    out = magnetic_survey / "out"
    out.mkdir()
    (out / ".lock").write_text(str(os.getpid()))  # a live process holds it
    msg = _error(capsys, ["run", str(magnetic_survey), "--until", "ingest"])
    assert "another potfield run" in msg


def test_gzip_and_semicolon_input(magnetic_survey, capsys):
    raw = magnetic_survey / "raw"
    table = pd.read_csv(raw / "lines.csv")
    (raw / "lines.csv").unlink()
    with gzip.open(raw / "lines.csv.gz", "wt") as handle:
        table.to_csv(handle, sep=";", index=False)
    text = (
        (magnetic_survey / "survey.toml")
        .read_text()
        .replace('files = ["raw/*.csv"]', 'files = ["raw/*.csv.gz"]')
    )
    (magnetic_survey / "survey.toml").write_text(text)
    assert main(["run", str(magnetic_survey), "--until", "ingest"]) == 0
    readings = pd.read_csv(magnetic_survey / "out" / "tables" / "readings.csv")
    assert len(readings) == len(table)


# ---- bad input: one line, exit code 2, no traceback -------------------------------------------


def _edit(root: Path, old: str, new: str) -> None:
    path = root / "survey.toml"
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new))


def test_error_no_survey_toml(tmp_path, capsys):
    assert "no survey.toml here" in _error(capsys, ["check", str(tmp_path)])


def test_error_missing_file(magnetic_survey, capsys):
    _edit(magnetic_survey, 'files = ["raw/*.csv"]', 'files = ["raw/flight1.csv"]')
    msg = _error(capsys, ["check", str(magnetic_survey)])
    assert "flight1.csv" in msg and "file not found" in msg


def test_error_empty_file(magnetic_survey, capsys):
    (magnetic_survey / "raw" / "lines.csv").write_text("")
    assert "file is empty" in _error(capsys, ["check", str(magnetic_survey)])


def test_error_missing_mapped_column(magnetic_survey, capsys):
    _edit(magnetic_survey, 'total_field = "total_field_nT"', 'total_field = "MAG"')
    msg = _error(capsys, ["check", str(magnetic_survey)])
    assert "column 'MAG'" in msg and "input.columns.total_field" in msg


def test_error_non_numeric_value_rows(magnetic_survey, capsys):
    path = magnetic_survey / "raw" / "lines.csv"
    table = pd.read_csv(path)
    table["total_field_nT"] = table["total_field_nT"].astype(object)
    table.loc[[4, 9], "total_field_nT"] = "bad"
    table.to_csv(path, index=False)
    msg = _error(capsys, ["check", str(magnetic_survey)])
    # data row 4 (0-based) is line 6 of the file: header is line 1
    assert "non-numeric value 'bad' in column total_field at line 6, 11" in msg


def test_error_unparseable_time(magnetic_survey, capsys):
    path = magnetic_survey / "raw" / "lines.csv"
    table = pd.read_csv(path)
    table.loc[2, "time_utc"] = "yesterday noon"
    table.to_csv(path, index=False)
    msg = _error(capsys, ["check", str(magnetic_survey)])
    assert "cannot read the time 'yesterday noon'" in msg and "line 4" in msg


def test_error_latitude_out_of_range(magnetic_survey, capsys):
    path = magnetic_survey / "raw" / "lines.csv"
    table = pd.read_csv(path)
    table.loc[7, "latitude"] = 123.0
    table.to_csv(path, index=False)
    msg = _error(capsys, ["check", str(magnetic_survey)])
    assert "latitude 123 outside -90..90 at line 9" in msg


def test_error_unknown_crs(magnetic_survey, capsys):
    _edit(magnetic_survey, 'crs = "EPSG:4326"', 'crs = "EPSG:999999"')
    msg = _error(capsys, ["check", str(magnetic_survey)])
    assert "unknown coordinate reference system 'EPSG:999999'" in msg


def test_error_unknown_key(magnetic_survey, capsys):
    _edit(magnetic_survey, "spike_window = 11", "spike_windw = 11")
    assert "did you mean 'spike_window'" in _error(capsys, ["check", str(magnetic_survey)])


def test_error_wrong_unit(magnetic_survey, capsys):
    _edit(magnetic_survey, 'total_field = "nT"', 'total_field = "gauss"')
    assert "unit 'gauss' for total_field is not known" in _error(capsys, ["check", str(magnetic_survey)])


def test_error_new_over_existing(magnetic_survey, capsys):
    assert "already exists" in _error(capsys, ["new", str(magnetic_survey), "--kind", "gravity"])


def test_manifest_keeps_finished_stages_when_a_later_one_fails(magnetic_survey, capsys):
    # --until reference finishes; then a broken [reference] date makes the next run fail there,
    # and the manifest must still hold the stages that finished before it.
    assert main(["run", str(magnetic_survey), "--until", "clean"]) == 0
    _edit(magnetic_survey, "[reference]\n", '[reference]\nigrf_date = "1850-01-01"\n')
    msg = _error(capsys, ["run", str(magnetic_survey), "--until", "reference"])
    assert "1900" in msg
    manifest = json.loads((magnetic_survey / "out" / "manifest.json").read_text())
    assert manifest["stages"]["clean"]["status"] == "done"


def test_from_reuses_earlier_stages(magnetic_survey, capsys):
    assert main(["run", str(magnetic_survey), "--until", "clean"]) == 0
    capsys.readouterr()
    assert main(["run", str(magnetic_survey), "--from", "clean", "--until", "clean"]) == 0
    out = capsys.readouterr().out
    assert "clean: unchanged, reused" in out and "ingest" not in out.split("clean")[0]
