"""Skipped and degraded steps are loud (manifest, checks.csv, console, --strict), and the
optional stages work: survey without time, anomaly already reduced ([reference] enabled =
false), final observed gravity station lists ([drift] enabled = false). Small invented surveys.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from potfield.cli import main


def _manifest(root: Path) -> dict:
    return json.loads((root / "out" / "manifest.json").read_text())


def _checks(root: Path) -> pd.DataFrame:
    return pd.read_csv(root / "out" / "tables" / "checks.csv")


def _edit_toml(root: Path, old: str, new: str) -> None:
    path = root / "survey.toml"
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new, 1))


def test_skipped_diurnal_is_recorded_printed_and_fails_strict(magnetic_survey, capsys):
    root = str(magnetic_survey)
    assert main(["run", root, "--until", "reference"]) == 0  # default exit code stays 0
    out = capsys.readouterr().out
    lines = [line for line in out.splitlines() if line.strip()]
    assert "SKIPPED" in out and "no base station given" in out
    assert "skipped: diurnal" in lines[-1]  # the last line names the skipped step
    entry = _manifest(magnetic_survey)["stages"]["diurnal"]
    assert entry["status"] == "skipped" and "no base station" in entry["summary"]
    steps = _checks(magnetic_survey).query("stage == 'diurnal'")
    assert list(steps["result"]) == ["skipped"]
    # --strict: a skipped step is a non-zero exit, also when every stage is reused
    assert main(["run", root, "--until", "reference", "--strict"]) == 1
    assert "diurnal: unchanged, reused -- SKIPPED" in capsys.readouterr().out
    # a clean result passes --strict
    assert main(["run", root, "--until", "clean", "--strict"]) == 0


def test_failed_check_fails_strict(magnetic_survey, capsys):
    # A tolerance nobody can meet: the clean stage's flagged-fraction check fails.
    _edit_toml(
        magnetic_survey,
        "# spec_overrides = { noise_fourth_difference_nT = 0.2 }",
        "spec_overrides = { max_flagged_fraction = 0.0 }",
    )
    assert main(["run", str(magnetic_survey), "--until", "clean"]) == 0
    last = [line for line in capsys.readouterr().out.splitlines() if line.strip()][-1]
    assert "failed spec check" in last and "fraction of readings flagged" in last
    assert main(["run", str(magnetic_survey), "--until", "clean", "--strict"]) == 1


def test_reference_disabled_takes_the_value_as_the_anomaly(magnetic_survey, capsys):
    _edit_toml(magnetic_survey, "[reference]\n", "[reference]\nenabled = false\n")
    assert main(["run", str(magnetic_survey), "--until", "level"]) == 0
    manifest = _manifest(magnetic_survey)
    entry = manifest["stages"]["reference"]
    assert entry["status"] == "skipped" and "enabled = false" in entry["summary"]
    assert entry["columns_added"] == ["anomaly"]
    table = pd.read_csv(magnetic_survey / "out" / "tables" / "readings.csv")
    assert "igrf" not in table
    # already reduced data: the anomaly is the value as given (no diurnal column: no base)
    assert np.array_equal(table["anomaly"].to_numpy(), table["total_field"].to_numpy())
    assert manifest["stages"]["level"]["state"]["levelled_column"] == "anomaly"


def test_survey_without_time(magnetic_survey, capsys):
    ppigrf = pytest.importorskip("ppigrf")
    _edit_toml(magnetic_survey, 'time = "time_utc"\n', "")
    _edit_toml(magnetic_survey, "[reference]\n", '[reference]\nigrf_date = "2024-05-01"\n')
    root = str(magnetic_survey)
    assert main(["check", root]) == 0
    assert "no time column" in capsys.readouterr().out
    assert main(["run", root, "--until", "level"]) == 0
    entry = _manifest(magnetic_survey)["stages"]["diurnal"]
    assert entry["status"] == "skipped" and "no time" in entry["summary"]
    table = pd.read_csv(magnetic_survey / "out" / "tables" / "readings.csv")
    assert "time" not in table and "flag_time_gap" not in table
    # IGRF at the fixed date against ppigrf (independent IGRF-14 implementation), 0.5 nT:
    # the date is passed at 00:00 UTC as in potfield's decimal year of the same day.
    rows = table.iloc[[0, len(table) // 2, len(table) - 1]]
    be, bn, bu = ppigrf.igrf(
        rows["longitude"].to_numpy(),
        rows["latitude"].to_numpy(),
        rows["height"].to_numpy() / 1000.0,
        dt.datetime(2024, 5, 1),
    )
    total = np.sqrt(be**2 + bn**2 + bu**2).ravel()
    assert np.allclose(rows["igrf"].to_numpy(), total, atol=0.5)
    # readings.csv rounds nT columns to 0.001 nT (io.columns.DECIMALS): two roundings apart
    assert np.allclose(table["anomaly"], table["total_field"] - table["igrf"], rtol=0, atol=0.0015)


STATION_TOML = """
[survey]
name = "station list"
kind = "gravity"
crs = "EPSG:4326"

[input]
files = ["raw/stations.csv"]

[input.columns]
station = "STATION"
longitude = "LON"
latitude = "LAT"
height = "HEIGHT"
reading = "GOBS"

[input.units]
reading = "mGal"

[drift]
enabled = false
"""


def test_final_gravity_station_list(tmp_path, capsys):
    boule = pytest.importorskip("boule")
    root = tmp_path / "stations"
    (root / "raw").mkdir(parents=True)
    (root / "survey.toml").write_text(STATION_TOML)
    # An invented list of 36 stations with final observed gravity (no time, no loops).
    rng = np.random.default_rng(3)
    lon = 141.0 + np.repeat(np.arange(6), 6) * 0.01
    lat = -32.0 + np.tile(np.arange(6), 6) * 0.01
    height = 200.0 + rng.uniform(0, 50, lon.size)
    gobs = 979_600.0 + rng.normal(0, 5, lon.size)
    pd.DataFrame(
        {
            "STATION": [f"S{i:02d}" for i in range(lon.size)],
            "LON": lon,
            "LAT": lat,
            "HEIGHT": height,
            "GOBS": gobs,
        }
    ).to_csv(root / "raw" / "stations.csv", index=False)
    assert main(["run", str(root), "--until", "reference"]) == 0
    out = capsys.readouterr().out
    assert "drift: skipped in" in out and "SKIPPED" in out
    manifest = _manifest(root)
    assert manifest["stages"]["drift"]["status"] == "skipped"
    assert "final observed gravity" in manifest["stages"]["drift"]["summary"]
    assert manifest["stages"]["reference"]["status"] == "done"
    table = pd.read_csv(root / "out" / "tables" / "readings.csv").sort_values("station")
    # the gravity disturbance is observed minus normal gravity at the station; normal gravity
    # from boule (independent implementation of the closed form, Li and Goetze 2001), 0.01 mGal
    gamma = boule.WGS84.normal_gravity((table["longitude"], table["latitude"], table["height"]))
    assert np.allclose(table["disturbance"], table["reading"] - gamma, atol=0.01)
    assert np.allclose(np.sort(table["reading"]), np.sort(gobs), atol=1e-6)
