"""The diurnal stage: base files (delimited and IAGA-2002) to the `diurnal` column, flags,
checks and tables, on a synthetic survey whose external variation is analytic."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from potfield.config import parse_config
from potfield.errors import ConfigError, InputDataError
from potfield.io.iaga2002 import write_iaga2002
from potfield.stages.base import StageContext
from potfield.stages.diurnal import STAGE
from potfield.survey import Survey

T0 = np.datetime64("2024-05-01T01:00:00", "ns")
LON0, LAT0 = 138.0, -33.0


def external(t):
    """Analytic external variation (nT) at time t (s after T0)."""
    return 20.0 * np.sin(2 * np.pi * t / 20000.0) + 2.0 * np.sin(2 * np.pi * t / 900.0 + 0.5)


def pulsations(t):
    """Short-period variations (nT), for the time-offset and chord checks."""
    return (
        0.6 * np.sin(2 * np.pi * t / 13.0)
        + 0.4 * np.sin(2 * np.pi * t / 29.0 + 1.0)
        + 0.3 * np.sin(2 * np.pi * t / 7.3 + 2.0)
    )


def _stamp(seconds):
    return T0 + np.round(np.asarray(seconds) * 1e9).astype("int64").astype("timedelta64[ns]")


def readings(extra=lambda t: 0.0 * t, static=False):
    """Four 10 Hz lines, 5 minutes each, starting 10 minutes after T0, from the base eastwards;
    with ``static`` also a 400 s static record beside the base before them (line 0990)."""
    frames = []
    for k in range(-1 if static else 0, 4):
        if k < 0:
            t = 100.0 + np.arange(0, 400.0, 0.1)
            lat, lon = np.full(t.size, LAT0 + 0.001), np.full(t.size, LON0)
        else:
            t = 600.0 + k * 420.0 + np.arange(0, 300.0, 0.1)
            lat = LAT0 + np.linspace(0.0, 0.05, t.size)
            lon = np.full(t.size, LON0 + 0.01 * k)
        geology = 40.0 * np.sin(lat * 300.0) + 10.0 * np.cos(lon * 500.0)
        frames.append(
            pd.DataFrame(
                {
                    "time": _stamp(t),
                    "longitude": lon,
                    "latitude": lat,
                    "height": 100.0,
                    "easting": 0.0,
                    "northing": 0.0,
                    "line": str(1000 + 10 * k),
                    "line_type": "traverse",
                    "distance": 0.0,
                    "source_file": "lines.csv",
                    "source_row": np.arange(t.size) + 2,
                    "total_field": 50_000.0 + geology + external(t) + extra(t),
                    "geology": geology,
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


def context(tmp_path, diurnal: dict, table=None, spec=None):
    (tmp_path / "raw").mkdir(exist_ok=True)
    config = parse_config({"survey": {"kind": "magnetic"}, "diurnal": diurnal})
    return StageContext(
        config=config, survey=Survey(tmp_path), table=readings() if table is None else table, spec=spec or {}
    )


def write_csv_base(tmp_path, seconds, values, name="base.csv"):
    frame = pd.DataFrame(
        {"UTC": pd.Series(_stamp(seconds)).dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), "MAG": values}
    )
    frame.to_csv(tmp_path / "raw" / name, index=False)
    return f"raw/{name}"


def csv_base(name, file, **extra):
    return {
        "name": name,
        "file": file,
        "columns": {"time": "UTC", "total_field": "MAG"},
        "longitude": LON0,
        "latitude": LAT0,
        **extra,
    }


def test_no_base_passes_through(tmp_path):
    out = STAGE.run(context(tmp_path, {}))
    assert out.table is None
    assert out.notes == ["no base station given: diurnal correction not applied"]
    assert out.skipped == out.notes[0]  # recorded as a skipped step by the runner
    assert STAGE.name == "diurnal" and STAGE.kinds == ("magnetic",) and STAGE.sections == ("diurnal",)


def test_delimited_base_recovers_the_analytic_variation(tmp_path):
    (tmp_path / "raw").mkdir()
    tb = np.arange(0.0, 3000.0)
    base = 48_500.0 + external(tb)
    keep = (tb < 1500) | (tb > 1530)  # a 31 s gap in the base record
    base_spiked = base.copy()
    base_spiked[200] += 15.0  # a spike, removed by the cleaning
    file = write_csv_base(tmp_path, tb[keep], base_spiked[keep])
    ctx = context(tmp_path, {"bases": [csv_base("B1", file)]})
    before = ctx.table.copy()
    out = STAGE.run(ctx)
    table = out.table
    pd.testing.assert_frame_equal(ctx.table, before)  # input table untouched
    assert len(table) == len(before) and list(table.columns[: len(before.columns)]) == list(before.columns)
    assert table["diurnal"].dtype == float and table["flag_base_gap"].dtype == bool
    t = (table["time"].to_numpy() - T0).astype("int64") / 1e9
    gap = (t > 1499) & (t < 1531)
    assert table["flag_base_gap"].to_numpy().tolist() == gap.tolist()
    # corrected field = 50000 + geology + datum offset; true variation known exactly
    corrected = table["total_field"] - table["diurnal"]
    residual = (corrected - table["geology"]).to_numpy()[~gap]
    assert np.ptp(residual) < 2e-3
    datum = out.state["bases"][0]["datum_nT"]
    # datum = median of the cleaned base over the survey span (hand: within the base's range)
    inside = (tb >= t.min()) & (tb <= t.max()) & keep
    assert datum == pytest.approx(np.median(base[inside]), abs=1e-9)
    assert out.metrics["base_B1"]["spikes"] == 1
    names = [c.name for c in out.checks]
    assert "diurnal chord 15 s (B1)" in names and "diurnal chord 60 s (B1)" in names
    # a quiet base: 2 nT over 900 s gives (2 pi/900)^2 x 2 x 60^2/8 = 0.044 nT over 60 s (hand)
    chord60 = next(c for c in out.checks if c.name == "diurnal chord 60 s (B1)")
    assert chord60.passed and chord60.value < 0.06 and chord60.tolerance == 3.0
    assert set(out.tables) == {"diurnal_lines", "base_record"}
    lines = out.tables["diurnal_lines"]
    assert lines["readings"].sum() == len(table) and len(lines) == 4
    assert len(out.tables["base_record"]) <= 20_000


def test_iaga_base_auto_with_clock_offset(tmp_path):
    (tmp_path / "raw").mkdir()
    tb = np.arange(0.0, 3000.0)
    frame = pd.DataFrame(
        {
            "time": _stamp(tb - 7200.0),  # logger kept on UTC-2 h
            "mag_north": 25_000.0,
            "mag_east": 500.0,
            "mag_down": -45_000.0,
            "total_field": 51_000.0 + external(tb),
        }
    )
    write_iaga2002(
        tmp_path / "raw" / "bas.sec",
        frame,
        {
            "iaga_code": "BAS",
            "reported": "XYZF",
            "latitude": LAT0,
            "longitude": LON0 + 360.0 * 0,
            "elevation": 10.0,
        },
    )
    ctx = context(
        tmp_path,
        {
            "bases": [{"name": "obs", "file": "raw/bas.sec", "time_offset_s": 7200.0}],
            "datum": "value",
            "datum_value": 51_000.0,
        },
    )
    out = STAGE.run(ctx)
    t = (out.table["time"].to_numpy() - T0).astype("int64") / 1e9
    # datum given: diurnal = base - 51000 = the external variation itself (to %10.2f rounding)
    np.testing.assert_allclose(out.table["diurnal"], external(t), atol=0.006)
    assert out.state["bases"][0]["longitude"] == pytest.approx(LON0)  # from the IAGA header
    assert not out.table["flag_base_gap"].any()


def test_date_seconds_base_and_datum_time(tmp_path):
    (tmp_path / "raw").mkdir()
    tb = np.arange(0.0, 3000.0)
    sod = 3600.0 + tb  # T0 is 01:00 UTC
    pd.DataFrame({"DATE": "2024-05-01", "SOD": sod, "MAG_UT": (49_000.0 + external(tb)) / 1000.0}).to_csv(
        tmp_path / "raw" / "base.txt", sep=" ", index=False
    )
    base = {
        "name": "B",
        "file": "raw/base.txt",
        "format": "delimited",
        "columns": {"time": "SOD", "date": "DATE", "total_field": "MAG_UT"},
        "units": {"total_field": "uT"},
        "time": {"format": "date_seconds"},
    }
    ctx = context(tmp_path, {"bases": [base], "datum": "time", "datum_time": "2024-05-01T01:20:00Z"})
    out = STAGE.run(ctx)
    t = (out.table["time"].to_numpy() - T0).astype("int64") / 1e9
    # datum = base at 01:20 (1200 s after T0): diurnal = external(t) - external(1200), uT read
    # as 1000 nT; linear interpolation error at 1 s is below 2 (2 pi/900)^2/8 = 1.2e-5 nT
    np.testing.assert_allclose(out.table["diurnal"], external(t) - external(1200.0), atol=3e-5)
    assert "datum time" in out.notes[0]


def test_no_overlap_is_a_clear_error(tmp_path):
    (tmp_path / "raw").mkdir()
    file = write_csv_base(tmp_path, np.arange(20_000.0, 21_000.0), np.full(1000, 48_000.0))
    ctx = context(tmp_path, {"bases": [csv_base("late", file)]})
    with pytest.raises(InputDataError) as err:
        STAGE.run(ctx)
    text = str(err.value)
    assert "base.csv" in text and "does not overlap" in text and "\n" not in text
    assert "2024-05-01T06:33:20 to 2024-05-01T06:49:59" in text  # base span (hand: T0 + 20000 s)
    # survey span (hand: 600 s after T0 to 600 + 3 x 420 + 299.9 s)
    assert "2024-05-01T01:10:00 to 2024-05-01T01:35:59" in text


def test_config_mistakes_name_the_key(tmp_path):
    (tmp_path / "raw").mkdir()
    file = write_csv_base(tmp_path, np.arange(0.0, 3000.0), np.full(3000, 48_000.0))
    with pytest.raises(ConfigError, match=r"diurnal.bases\[0\].columns.total_field"):
        STAGE.run(context(tmp_path, {"bases": [{"name": "b", "file": file, "columns": {"time": "UTC"}}]}))
    with pytest.raises(ConfigError, match="diurnal.datum_value"):
        STAGE.run(context(tmp_path, {"bases": [csv_base("b", file)], "datum": "value"}))
    with pytest.raises(ConfigError, match=r"diurnal.bases\[1\].name.*used twice"):
        STAGE.run(context(tmp_path, {"bases": [csv_base("b", file), csv_base("b", file)]}))
    with pytest.raises(InputDataError, match="base station file not found"):
        STAGE.run(context(tmp_path, {"bases": [csv_base("b", "raw/none.csv")]}))


def test_two_bases_distance_weights_and_station_difference(tmp_path):
    (tmp_path / "raw").mkdir()
    tb = np.arange(0.0, 3000.0)
    # the variation grows linearly northwards: 1.0 x external at LAT0, 1.1 x at LAT0 + 0.05
    south = write_csv_base(tmp_path, tb, 48_000.0 + external(tb), "south.csv")
    north = write_csv_base(tmp_path, tb, 48_300.0 + 1.1 * external(tb), "north.csv")
    bases = [csv_base("S", south), {**csv_base("N", north), "latitude": LAT0 + 0.05}]
    table = readings()
    table = table[table["line"] == "1000"].reset_index(drop=True)  # on the meridian joining them
    ctx = context(tmp_path, {"bases": bases, "combine": "distance", "distance_power": 1.0}, table=table)
    out = STAGE.run(ctx)
    t = (out.table["time"].to_numpy() - T0).astype("int64") / 1e9
    frac = (out.table["latitude"].to_numpy() - LAT0) / 0.05
    # inverse distance with p = 1 between two bases is linear along the great circle (Shepard 1968)
    datum_s, datum_n = (b["datum_nT"] for b in out.state["bases"])
    expected = (1 - frac) * (external(t) + 48_000 - datum_s) + frac * (1.1 * external(t) + 48_300 - datum_n)
    np.testing.assert_allclose(out.table["diurnal"], expected, atol=2e-3)
    check = next(c for c in out.checks if c.name.startswith("diurnal station difference"))
    # the difference N - S is 300 + 0.1 x external: departs from its median by at most
    # 0.1 x the range of the external variation over the survey span
    span = (t.min() <= tb) & (tb <= t.max())
    rest = 0.1 * external(tb[span])
    assert check.value == pytest.approx(np.max(np.abs(rest - np.median(rest))), abs=0.01)
    assert check.passed


def test_time_offset_and_chord_checks(tmp_path):
    (tmp_path / "raw").mkdir()
    tb = np.arange(0.0, 3000.0)
    lag = 4.0  # base clock behind the survey's by 4 s: base stamp = true time - 4
    base = 48_000.0 + external(tb + lag) + pulsations(tb + lag)
    file = write_csv_base(tmp_path, tb, base)
    table = readings(extra=pulsations, static=True)
    ctx = context(
        tmp_path,
        {"bases": [csv_base("B", file)], "offset_radius_m": 300.0},
        table=table,
        spec={"diurnal_chord_15s_nT": (0.5, "test spec")},
    )
    out = STAGE.run(ctx)
    offset = next(c for c in out.checks if c.name == "diurnal time offset (B)")
    # survey stamp t sees base stamp t - 4: lag +4 s (survey ahead), beyond the 1 s tolerance
    assert out.metrics["base_B"]["time_offset_s"] == pytest.approx(lag, abs=0.3)
    assert not offset.passed
    # pulsations of ~1 nT at 7-29 s periods break the 0.5 nT / 15 s chord spec
    chord15 = next(c for c in out.checks if c.name == "diurnal chord 15 s (B)")
    assert not chord15.passed and chord15.source == "test spec"
    # with the clock fixed the offset is gone
    ctx = context(
        tmp_path, {"bases": [csv_base("B", file, time_offset_s=lag)], "offset_radius_m": 300.0}, table=table
    )
    out = STAGE.run(ctx)
    assert abs(out.metrics["base_B"]["time_offset_s"]) < 0.3
    assert next(c for c in out.checks if c.name == "diurnal time offset (B)").passed
    corrected = out.table["total_field"] - out.table["diurnal"]
    rest = (corrected - out.table["geology"]).to_numpy()
    # linear interpolation of the 1 s base errs by at most sum A (2 pi / P)^2 / 8 (h = 1 s;
    # Burden and Faires, Numerical Analysis): 0.048 nT for the pulsations above
    bound = sum(a * (2 * np.pi / p) ** 2 / 8 for a, p in ((0.6, 13.0), (0.4, 29.0), (0.3, 7.3)))
    bound += 2.0 * (2 * np.pi / 900.0) ** 2 / 8 + 20.0 * (2 * np.pi / 20000.0) ** 2 / 8
    assert np.max(np.abs(rest - np.median(rest))) <= 2 * bound
    assert np.ptp(rest) <= 2 * bound


def test_base_relocation_levels_each_session_and_warns(tmp_path):
    # invented: the base is moved while logging at 1380 s (between lines 1010 and 1020): its
    # level steps by +40 nT (the field difference of the two sites; common practice); the
    # record starts with a settling transient 20 exp(-t / 30 s) nT
    (tmp_path / "raw").mkdir()
    tb = np.arange(0.0, 3000.0)
    base = 48_500.0 + external(tb) + 40.0 * (tb >= 1380) + 20.0 * np.exp(-tb / 30.0)
    file = write_csv_base(tmp_path, tb, base)
    out = STAGE.run(context(tmp_path, {"bases": [csv_base("B1", file)]}))
    table = out.table
    t = (table["time"].to_numpy() - T0).astype("int64") / 1e9
    m = out.metrics["base_B1"]
    assert m["sessions"] == 2 and len(m["jumps"]) == 1
    assert m["jumps"][0]["kind"] == "step" and m["jumps"][0]["size_nT"] == pytest.approx(40.0, abs=1.0)
    assert m["transient_samples"] > 30  # 20 exp(-t/30) > 3 nT for t < 30 ln(20/3) = 57 s (hand)
    assert any(w.startswith("degraded: base 'B1' level jumps by +") for w in out.warnings), out.warnings
    assert any(n.startswith("degraded:") for n in out.notes)
    # each session is levelled to its own datum: inside a session the corrected field is the
    # geology plus one constant (Reford 1980: corrected = T - (B - B0))
    corrected = (table["total_field"] - table["diurnal"] - table["geology"]).to_numpy()
    first, second = t < 1380, t >= 1380
    assert np.ptp(corrected[first]) < 2e-3 and np.ptp(corrected[second]) < 2e-3
    # the constants differ by the sessions' median external levels over the survey, not by the
    # 40 nT jump
    span = (tb >= t.min()) & (tb <= t.max())
    expected = np.median(external(tb[span & (tb >= 1380)])) - np.median(external(tb[span & (tb < 1380)]))
    assert corrected[second].mean() - corrected[first].mean() == pytest.approx(expected, abs=0.05)
    assert len(out.state["bases"][0]["session_datums_nT"]) == 2
