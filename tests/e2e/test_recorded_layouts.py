"""Surveys read as recorded, through the command line, with the example configs of
configs/examples/ on invented files written in each layout (never real data).

Independent references: Python's datetime/zoneinfo for times, the international foot
(0.3048 m exactly, international yard and pound agreement of 1959), the UTM zone numbering
(zone = floor((lon + 180) / 6) + 1, EPSG 327zz south; EPSG registry), Longman (1959) for the
size of the Earth tide (never above about 0.35 mGal).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta
from importlib import resources
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest

from potfield.cli import main


def _example(name: str) -> str:
    return (resources.files("potfield") / "data" / "configs" / "examples" / name).read_text()


def _survey(tmp_path: Path, example: str, edit=None) -> Path:
    root = tmp_path / "survey"
    (root / "raw").mkdir(parents=True)
    text = _example(example)
    if edit:
        text = edit(text)
    (root / "survey.toml").write_text(text)
    return root


def _run(root: Path, until: str, capsys) -> pd.DataFrame:
    code = main(["run", str(root), "--until", until])
    err = capsys.readouterr().err
    assert code == 0, err
    return pd.read_csv(root / "out" / "tables" / "readings.csv", dtype={"raw_Fid": str})


def _times(series: pd.Series) -> pd.Series:
    """readings.csv times (ISO 8601 with Z) as naive UTC timestamps."""
    return pd.to_datetime(series, utc=True).dt.tz_localize(None)


def _manifest(root: Path) -> dict:
    return json.loads((root / "out" / "manifest.json").read_text())


# --- relative gravimeter text export ------------------------------------------------------------


def _gravimeter_export(root: Path) -> pd.DataFrame:
    visits = [
        ("B1", "08:00:05", 0.0),
        ("S1", "08:20:10", 1.2),
        ("S2", "08:40:00", -0.8),
        ("B1", "09:00:30", 0.0),
        ("S3", "09:20:00", 2.5),
        ("S1", "09:40:00", 1.2),
        ("B1", "10:00:00", 0.0),
    ]
    rows = []
    for k, (station, clock, offset) in enumerate(visits):
        position = {
            "B1": (138.60, -34.90, 100.0),
            "S1": (138.61, -34.90, 110.0),
            "S2": (138.62, -34.91, 120.0),
            "S3": (138.63, -34.92, 130.0),
        }[station]
        rows.append(
            {
                "station": station,
                "date": "2024/05/01",
                "time": clock,
                "reading": f"{3124.500 + offset + 0.01 * k:.3f}",
                "sd": f"{0.010 + 0.001 * k:.3f}",
                "tilt_x": f"{k - 3:.1f}",
                "tilt_y": "-2.0",
                "temperature": "0.21",
                "tide_corr": f"{0.040 - 0.01 * k:.3f}",
                "duration": "60",
                "rejected": str(k % 2),
                "lat": position[1],
                "lon": position[0],
                "elev": position[2],
            }
        )
    table = pd.DataFrame(rows)
    table.to_csv(root / "raw" / "loop1.txt", sep="\t", index=False)
    return table


def test_gravimeter_export_keeps_sd_and_the_meter_tide(tmp_path, capsys):
    root = _survey(tmp_path, "gravimeter-export.toml")
    raw = _gravimeter_export(root)
    readings = _run(root, "drift", capsys).sort_values("source_row").reset_index(drop=True)
    assert list(readings["reading_sd"]) == pytest.approx(raw["sd"].astype(float).tolist())
    assert list(readings["meter_tide"]) == pytest.approx(raw["tide_corr"].astype(float).tolist())
    assert list(readings["raw_tilt_x"].astype(str)) == raw["tilt_x"].tolist()
    assert {"raw_tilt_y", "raw_temperature", "raw_duration", "raw_rejected"} <= set(readings.columns)
    # the meter already added its tide: potfield adds none (no double correction)
    assert (readings["tide"] == 0.0).all()
    assert _manifest(root)["stages"]["drift"]["state"]["tide_by_meter"] is True
    want = [datetime.strptime("2024/05/01 " + t, "%Y/%m/%d %H:%M:%S") for t in raw["time"]]  # stdlib
    assert list(_times(readings["time"])) == want


def test_gravimeter_export_without_meter_tide_gets_the_longman_tide(tmp_path, capsys):
    def edit(text):
        return text.replace('meter_tide = "tide_corr"\n', "").replace('meter_tide = "mGal"\n', "")

    root = _survey(tmp_path, "gravimeter-export.toml", edit)
    _gravimeter_export(root)
    readings = _run(root, "drift", capsys)
    tide = readings["tide"].to_numpy()
    # Longman (1959): the body tide is a few tenths of a mGal at most (never above ~0.35 mGal)
    assert np.all(np.abs(tide) < 0.35) and np.ptp(tide) > 0.001
    assert _manifest(root)["stages"]["drift"]["state"]["tide_by_meter"] is False


# --- ASEG-GDF2 ---------------------------------------------------------------------------------

GDF_DES = """\
DEFN   ST=RECD,RT=COMM;RT:A4;COMMENTS:A76
DEFN 1 ST=RECD,RT=;FID:F10.1:UNITS=s,NAME=fiducial
DEFN 2 ST=RECD,RT=;LINE:I8:NAME=line number
DEFN 3 ST=RECD,RT=;DATE:I9:NAME=date YYYYMMDD
DEFN 4 ST=RECD,RT=;TIME:F10.2:UNITS=s,NAME=seconds of day
DEFN 5 ST=RECD,RT=;LON:F12.6:UNITS=deg
DEFN 6 ST=RECD,RT=;LAT:F11.6:UNITS=deg
DEFN 7 ST=RECD,RT=;ALT:F8.1:UNITS=ft,NULL=-9999.9,NAME=sensor height
DEFN 8 ST=RECD,RT=;MAG:F11.3:UNITS=nT,NULL=-99999.999,NAME=total field
DEFN 9 ST=RECD,RT=;END DEFN
"""


def test_aseg_gdf2_pair(tmp_path, capsys):
    root = _survey(tmp_path, "aseg-gdf2.toml")
    lines = ["COMM invented survey, not real data"]
    fid = 100.0
    for k, line in enumerate((10, 20, 30)):
        for i in range(20):
            lat = -34.90 + 0.0005 * (i if k % 2 == 0 else 19 - i)
            lon = 138.50 + 0.002 * k
            mag = -99999.999 if (line, i) == (20, 5) else 56000.0 + 0.5 * i
            lines.append(
                "%10.1f%8d%9d%10.2f%12.6f%11.6f%8.1f%11.3f"  # noqa: UP031
                % (fid, line, 20240501, 36000.0 + fid - 100.0, lon, lat, 328.1, mag)
            )
            fid += 1.0
    (root / "raw" / "survey.dat").write_text("\n".join(lines) + "\n")
    (root / "raw" / "survey.des").write_text(GDF_DES)
    readings = _run(root, "ingest", capsys)
    assert len(readings) == 60
    # the international foot: 0.3048 m exactly (1959 agreement)
    # the international foot: 0.3048 m exactly (1959 agreement); readings.csv keeps heights to 1 mm
    np.testing.assert_allclose(readings["height"], 328.1 * 0.3048, rtol=0, atol=0.0006)
    assert readings["total_field"].isna().sum() == 1  # the NULL value
    first = readings.sort_values("raw_FID").iloc[0]
    assert _times(pd.Series([first["time"]]))[0] == pd.Timestamp("2024-05-01T10:00:00")  # 36000 s of day
    # UTM zone of 138.5 E: floor((138.5 + 180) / 6) + 1 = 54, south -> EPSG:32754 (EPSG registry)
    assert _manifest(root)["stages"]["ingest"]["state"]["crs_code"] == "EPSG:32754"
    # a pattern matching the .des too reads the pair once
    toml = root / "survey.toml"
    toml.write_text(toml.read_text().replace('files = ["raw/*.dat"]', 'files = ["raw/survey.*"]'))
    assert len(_run(root, "ingest", capsys)) == 60


# --- comment-block header, hhmmss in local time --------------------------------------------------


def test_comment_header_local_time_and_fiducial(tmp_path, capsys):
    root = _survey(tmp_path, "comment-header.toml")
    body = [
        "/ invented ground magnetic survey, not real data",
        "/ Fid  Line  Easting   Northing    Mag-Total  Date        Time",
        "/--------------------------------------------------------------",
    ]
    for k, line in enumerate((10, 20)):
        for i in range(30):
            north = 6_100_000.0 + 10.0 * (i if k == 0 else 29 - i)
            clock = (datetime(2024, 5, 1, 9, 30, 15) + timedelta(seconds=i + 100 * k)).strftime("%H%M%S")
            body.append(
                f"  {1000 + 100 * k + i:04d}  {line}   {500000.0 + 50.0 * k:.1f}  {north:.1f}  "
                f"{56012.0 + 0.1 * i:.2f}  01/05/2024  {clock.lstrip('0')}"
            )
    (root / "raw" / "ground.xyz").write_text("\n".join(body) + "\n")
    readings = _run(root, "ingest", capsys)
    assert len(readings) == 60
    first = readings[readings["raw_Fid"] == "1000"].iloc[0]
    assert first["source_row"] == 4
    # 09:30:15 in Adelaide on 1 May (no daylight saving then, UTC+9:30; IANA tzdb via zoneinfo)
    local = datetime(2024, 5, 1, 9, 30, 15, tzinfo=ZoneInfo("Australia/Adelaide"))
    assert _times(pd.Series([first["time"]]))[0] == pd.Timestamp(local.astimezone(UTC).replace(tzinfo=None))
    assert set(readings["raw_Fid"].str.len()) == {4}  # carried unchanged (leading zeros kept)


# --- base log with decimal commas, local clock and quality codes --------------------------------


def test_base_log_decimal_commas_quality_codes(magnetic_survey, capsys):
    root = magnetic_survey
    lines = pd.read_csv(root / "raw" / "lines.csv")
    utc = pd.to_datetime(lines["time_utc"]).dt.tz_localize(None)
    start = utc.min().floor("min") - pd.Timedelta(minutes=2)
    seconds = np.arange(int((utc.max() - start).total_seconds()) + 180)
    times = start + pd.to_timedelta(seconds, unit="s")
    ramp = 56000.0 + 0.01 * seconds
    bad = (seconds >= 240) & (seconds < 360)  # two minutes logged with quality code 9
    value = np.where(bad, ramp + 5.0, ramp)
    local = times + pd.Timedelta(hours=9.5)  # logger clock on UTC+9:30
    base = pd.DataFrame(
        {
            "date": local.strftime("%d.%m.%Y"),
            "time": local.strftime("%H:%M:%S"),
            "F": [f"{v:.2f}".replace(".", ",") for v in value],
            "Q": np.where(bad, "9", np.where(seconds % 2 == 0, "1", "2")),
        }
    )
    (root / "base").mkdir()
    base.to_csv(root / "base" / "base.txt", sep=";", index=False)
    example = _example("base-log-decimal-comma.toml")
    block = example[example.index("[[diurnal.bases]]") :]
    text = (
        (root / "survey.toml")
        .read_text()
        .replace("[diurnal]\n", '[diurnal]\nbase_quality_column = "Q"\nbase_quality_accepted = ["1", "2"]\n')
    )
    (root / "survey.toml").write_text(text + "\n" + block)
    readings = _run(root, "diurnal", capsys)
    metrics = _manifest(root)["stages"]["diurnal"]["metrics"]["base_BASE1"]
    assert metrics["quality_rejected"] == int(bad.sum())
    t = (_times(readings["time"]) - start).dt.total_seconds().to_numpy()
    ok = ~readings["flag_base_gap"].to_numpy(bool)
    # linear ramp of 0.01 nT/s: the correction differs between readings by 0.01 nT per second
    # (the rejected +5 nT block never reaches the correction)
    d = readings["diurnal"].to_numpy()[ok] - 0.01 * t[ok]
    assert np.ptp(d) < 2e-3  # readings.csv rounds nT to 0.001
    in_block = (t >= 240) & (t < 360)
    assert readings["flag_base_gap"].to_numpy(bool)[in_block].all() and in_block.any()


# --- observatory minute values as delimited text ------------------------------------------------


def test_observatory_delimited_stations(tmp_path, capsys):
    root = _survey(tmp_path, "observatory-delimited.toml")
    minutes = pd.date_range("2024-05-01 00:00", periods=90, freq="min")
    for code, base in (("aaa", (21000.0, 1500.0, 43000.0)), ("bbb", (19000.0, 1200.0, 45000.0))):
        x = base[0] + np.sin(np.arange(90) / 10.0)
        frame = pd.DataFrame(
            {"time": minutes.strftime("%Y-%m-%d %H:%M:%S"), "X": x, "Y": base[1], "Z": base[2]}
        )
        frame["F"] = np.sqrt(frame.X**2 + frame.Y**2 + frame.Z**2)
        frame.loc[7, "Z"] = 99999.0
        frame.to_csv(root / "raw" / f"{code}_min.csv", index=False, float_format="%.2f")
    readings = _run(root, "ingest", capsys)
    assert sorted(readings["station"].unique()) == ["AAA", "BBB"]
    aaa = readings[readings["station"] == "AAA"]
    assert (aaa["longitude"] == 10.0).all() and (aaa["latitude"] == 45.0).all()
    assert (aaa["height"] == 100.0).all()
    assert aaa["mag_down"].isna().sum() == 1  # 99999 = missing (IAGA-2002 convention)


# --- compressed input through the command line --------------------------------------------------


@pytest.mark.parametrize("suffix", [".xz", ".bz2", ".zip"])
def test_compressed_survey_file_with_auto_delimiter(magnetic_survey, capsys, suffix):
    import bz2
    import lzma
    import zipfile

    raw = magnetic_survey / "raw"
    text = (raw / "lines.csv").read_text()
    (raw / "lines.csv").unlink()
    target = raw / f"lines.csv{suffix}" if suffix != ".zip" else raw / "lines.zip"
    if suffix == ".zip":
        with zipfile.ZipFile(target, "w", compression=zipfile.ZIP_DEFLATED) as archive:
            archive.writestr("lines.csv", text)
    else:
        with (lzma.open if suffix == ".xz" else bz2.open)(target, "wt") as handle:
            handle.write(text)
    toml = magnetic_survey / "survey.toml"
    toml.write_text(toml.read_text().replace('files = ["raw/*.csv"]', f'files = ["raw/{target.name}"]'))
    readings = _run(magnetic_survey, "ingest", capsys)
    assert len(readings) == text.count("\n") - 1  # every data line, none lost
