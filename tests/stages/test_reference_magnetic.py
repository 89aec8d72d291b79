"""reference stage, magnetic and observatory kinds (potfield.stages.reference_magnetic)."""

from __future__ import annotations

import datetime as dt
import json
import warnings

import numpy as np
import pandas as pd
import pytest

from potfield.config import parse_config
from potfield.errors import ConfigError, InputDataError, ModelRangeError, StageError
from potfield.fields.magnetic.igrf import decimal_year, igrf
from potfield.stages.base import StageContext
from potfield.stages.reference_magnetic import run_magnetic
from potfield.survey import Survey


def _ctx(tmp_path, table, kind="magnetic", reference=None, state=None):
    config = parse_config({"survey": {"kind": kind}, "reference": reference or {}})
    return StageContext(config=config, survey=Survey(tmp_path), table=table, state=state or {})


def _magnetic_table(n=400, start="2023-06-01T08:00", diurnal=True, seed=0):
    rng = np.random.default_rng(seed)
    time = np.datetime64(start, "ns") + (np.arange(n) * 10 * 1e9).astype("timedelta64[ns]")
    table = pd.DataFrame(
        {
            "time": time,
            "longitude": 24.0 + rng.uniform(0, 0.3, n),
            "latitude": 61.0 + rng.uniform(0, 0.2, n),
            "height": 150.0 + rng.uniform(0, 80, n),
            "line": np.repeat(["10", "20"], n // 2),
            "source_file": "raw/survey.csv",
            "source_row": np.arange(n) + 2,
        }
    )
    table["total_field"] = 52_000.0 + rng.normal(0, 50, n)
    if diurnal:
        table["diurnal"] = rng.normal(0, 10, n)
    return table


def _ppigrf_total(lon, lat, h_m, when):
    ppigrf = pytest.importorskip("ppigrf")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        be, bn, bu = ppigrf.igrf(lon, lat, np.asarray(h_m) / 1000.0, when)
    return np.sqrt(be**2 + bn**2 + bu**2)[0]


def test_magnetic_columns_match_the_fields_function(tmp_path):
    table = _magnetic_table()
    out = run_magnetic(_ctx(tmp_path, table))
    t = out.table
    expected = igrf(
        table.longitude.to_numpy(), table.latitude.to_numpy(), table.height.to_numpy(), table.time.to_numpy()
    ).total
    np.testing.assert_allclose(t["igrf"], expected, rtol=0, atol=1e-9)
    np.testing.assert_allclose(t["anomaly"], table.total_field - table.diurnal - expected, atol=1e-9)
    assert not t["flag_reference_missing"].any()
    # The input table is not modified and no column is rewritten or row dropped (project rule).
    assert "igrf" not in table.columns and len(t) == len(table)
    pd.testing.assert_frame_equal(t[table.columns], table)
    assert out.state["igrf_date_mode"] == "per-reading"
    json.dumps(out.state), json.dumps(out.metrics)


def test_fixed_date_anomaly_against_ppigrf(tmp_path):
    table = _magnetic_table(n=200)
    out = run_magnetic(_ctx(tmp_path, table, reference={"igrf_date": "2020-01-01"}))
    # At an epoch date ppigrf's day-linear interpolation coincides with decimal years.
    ref = _ppigrf_total(
        table.longitude.to_numpy(),
        table.latitude.to_numpy(),
        table.height.to_numpy(),
        dt.datetime(2020, 1, 1),
    )
    # Reference library: ppigrf 2.1 (IGRF-14); anomaly = T - diurnal - F (references.md).
    np.testing.assert_allclose(out.table["anomaly"], table.total_field - table.diurnal - ref, atol=0.01)
    assert out.state["igrf_date_mode"] == "fixed" and out.state["igrf_date"] == "2020-01-01"
    # The fixed date differs from the readings' dates (2023): the model changes by > 10 nT.
    per_reading = run_magnetic(_ctx(tmp_path, table)).table["igrf"]
    assert np.max(np.abs(per_reading - out.table["igrf"])) > 10.0


def test_per_reading_anomaly_against_ppigrf_without_diurnal(tmp_path):
    table = _magnetic_table(n=60, start="2010-01-01T00:00", diurnal=False)
    out = run_magnetic(_ctx(tmp_path, table))
    ref = _ppigrf_total(
        table.longitude.to_numpy(),
        table.latitude.to_numpy(),
        table.height.to_numpy(),
        dt.datetime(2010, 1, 1),
    )
    # Reference library: ppigrf 2.1. The readings span 10 minutes past an epoch date: the field
    # changes by far less than 0.01 nT in that time (SV is at most ~100 nT/yr; from memory).
    np.testing.assert_allclose(out.table["anomaly"], table.total_field - ref, atol=0.01)
    assert any("no diurnal column" in w for w in out.warnings)


def test_centroid_state(tmp_path):
    table = _magnetic_table()
    state = {"ingest": {"centroid": [24.15, 61.1]}}
    out = run_magnetic(_ctx(tmp_path, table, state=state))
    s = out.state
    year = float(np.median(decimal_year(table.time.to_numpy())))
    centre = igrf(24.15, 61.1, float(table.height.median()), year)
    assert s["inclination"] == pytest.approx(float(centre.inclination), abs=1e-12)
    assert s["declination"] == pytest.approx(float(centre.declination), abs=1e-12)
    assert s["total_intensity"] == pytest.approx(float(centre.total), abs=1e-9)
    # Southern Finland: I about 74-75 deg, D about +10 deg east in the 2020s (from memory).
    assert 72 < s["inclination"] < 77 and 5 < s["declination"] < 15
    assert s["centroid_time"].startswith("2023-06-01")
    assert out.metrics["igrf_min"] <= out.metrics["igrf_mean"] <= out.metrics["igrf_max"]
    assert "anomaly_std" in out.metrics


def test_centroid_without_ingest_state_uses_circular_mean(tmp_path):
    table = _magnetic_table(n=100)
    table["longitude"] = np.where(np.arange(100) % 2 == 0, 179.9, -179.9)
    out = run_magnetic(_ctx(tmp_path, table))
    # Across the antimeridian the centroid is near 180, not 0 (common practice: circular mean).
    assert abs(abs(out.state["centroid"][0]) - 180.0) < 0.01


def test_missing_position_is_flagged_not_dropped(tmp_path):
    table = _magnetic_table(n=50)
    table.loc[3, "height"] = np.nan
    table.loc[7, "time"] = pd.NaT
    out = run_magnetic(_ctx(tmp_path, table))
    flags = out.table["flag_reference_missing"].to_numpy()
    assert flags[3] and flags[7] and flags.sum() == 2
    assert np.isnan(out.table["anomaly"][3]) and len(out.table) == 50
    assert np.isfinite(out.state["inclination"])


def test_flagged_readings_excluded_from_anomaly_stats(tmp_path):
    table = _magnetic_table(n=100)
    table["flag_spike"] = False
    table.loc[5, "flag_spike"] = True
    table.loc[5, "total_field"] = 1.0e6
    out = run_magnetic(_ctx(tmp_path, table))
    assert out.metrics["anomaly_max"] < 1000.0  # the spike is flagged, so not in the statistics


def test_dates_outside_model_name_the_row(tmp_path):
    table = _magnetic_table(n=20)
    table.loc[4, "time"] = np.datetime64("1850-01-01")
    with pytest.raises(ModelRangeError) as info:
        run_magnetic(_ctx(tmp_path, table))
    text = str(info.value)
    assert "raw/survey.csv" in text and "row 6" in text and "1900" in text and "\n" not in text


def test_bad_fixed_date_is_a_config_error(tmp_path):
    table = _magnetic_table(n=10)
    with pytest.raises(ConfigError, match="reference.igrf_date"):
        run_magnetic(_ctx(tmp_path, table, reference={"igrf_date": "last tuesday"}))
    with pytest.raises(ModelRangeError, match="reference.igrf_date"):
        run_magnetic(_ctx(tmp_path, table, reference={"igrf_date": "2035-01-01"}))


def test_missing_columns_and_latitudes(tmp_path):
    table = _magnetic_table(n=10).drop(columns="height")
    with pytest.raises(StageError, match="'height'"):
        run_magnetic(_ctx(tmp_path, table))
    table = _magnetic_table(n=10)
    table.loc[2, "latitude"] = 123.0
    with pytest.raises(InputDataError, match="row 4"):
        run_magnetic(_ctx(tmp_path, table))


def test_no_time_column_needs_a_fixed_date(tmp_path):
    table = _magnetic_table(n=10, diurnal=False).drop(columns="time")
    with pytest.raises(StageError, match="igrf_date"):
        run_magnetic(_ctx(tmp_path, table))
    out = run_magnetic(_ctx(tmp_path, table, reference={"igrf_date": "2005-01-01"}))
    ref = _ppigrf_total(
        table.longitude.to_numpy(),
        table.latitude.to_numpy(),
        table.height.to_numpy(),
        dt.datetime(2005, 1, 1),
    )
    # Reference library: ppigrf 2.1 at the epoch date 2005.0.
    np.testing.assert_allclose(out.table["igrf"], ref, atol=0.01)


def test_forecast_warning_after_2025(tmp_path):
    table = _magnetic_table(n=10, start="2026-03-01T00:00")
    out = run_magnetic(_ctx(tmp_path, table))
    assert any("forecast" in w for w in out.warnings)


# --- observatory ----------------------------------------------------------------------------


def _observatory_table():
    stations = {"NUR": (24.65, 60.51, 105.0), "TRO": (18.94, 69.66, 132.0), "HER": (19.23, -34.42, 26.0)}
    minutes = np.datetime64("2015-01-01T00:00", "ns") + (np.arange(30) * 60 * 1e9).astype("timedelta64[ns]")
    frames = []
    for code, (lon, lat, h) in stations.items():
        f = igrf(lon, lat, h, minutes)
        frames.append(
            pd.DataFrame(
                {
                    "line": code,
                    "station": code,
                    "time": minutes,
                    "longitude": lon,
                    "latitude": lat,
                    "height": h,
                    # Synthetic records: model plus a known disturbance (+20, -5, +8 nT).
                    "mag_north": f.north + 20.0,
                    "mag_east": f.east - 5.0,
                    "mag_down": f.down + 8.0,
                    "total_field": np.nan,
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


def test_observatory_components_against_ppigrf(tmp_path):
    table = _observatory_table()
    out = run_magnetic(_ctx(tmp_path, table, kind="observatory"))
    t = out.table
    ppigrf = pytest.importorskip("ppigrf")
    for code in ("NUR", "TRO", "HER"):
        rows = t[t.station == code]
        lon, lat, h = rows.iloc[0][["longitude", "latitude", "height"]]
        be, bn, bu = ppigrf.igrf(lon, lat, h / 1000.0, dt.datetime(2015, 1, 1))
        first = rows.iloc[0]
        # Reference library: ppigrf 2.1 (IGRF-14 at the epoch date 2015.0).
        assert first.igrf_north == pytest.approx(float(bn[0]), abs=0.01)
        assert first.igrf_east == pytest.approx(float(be[0]), abs=0.01)
        assert first.igrf_down == pytest.approx(float(-bu[0]), abs=0.01)
    # Disturbance = observed - IGRF recovers the known offsets (definition).
    np.testing.assert_allclose(t.disturbance_north, 20.0, atol=1e-8)
    np.testing.assert_allclose(t.disturbance_east, -5.0, atol=1e-8)
    np.testing.assert_allclose(t.disturbance_down, 8.0, atol=1e-8)
    assert np.isnan(t.disturbance_total).all()  # no F recorded
    assert out.metrics["disturbance_north_rms"] == pytest.approx(20.0, abs=1e-8)
    stations = out.tables["reference_stations"]
    assert list(stations.station) == ["HER", "NUR", "TRO"] and (stations.readings == 30).all()
    assert set(out.state["stations"]) == {"HER", "NUR", "TRO"}
    # Hermanus lies in the southern hemisphere: the field points up there (common practice).
    assert out.state["stations"]["HER"]["inclination"] < -50
    json.dumps(out.state), json.dumps(out.metrics)


def test_observatory_needs_components_or_total(tmp_path):
    table = _observatory_table().drop(columns=["mag_north", "total_field"])
    with pytest.raises(StageError, match="mag_north"):
        run_magnetic(_ctx(tmp_path, table, kind="observatory"))


def test_stage_dispatch_through_reference_module(tmp_path):
    from potfield.stages.reference import STAGE

    out = STAGE.run(_ctx(tmp_path, _magnetic_table(n=20)))
    assert "anomaly" in out.table.columns
