"""Remote reference: a survey without a base takes its diurnal correction from an observatory
network's fitted external field (potfield.fields.harmonic.separation.external_field_at)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from potfield.config import parse_config
from potfield.errors import InputDataError
from potfield.fields.magnetic.igrf import igrf
from potfield.stages import diurnal
from potfield.stages.base import StageContext
from potfield.survey import Survey


def _context(tmp_path, table, reference="coefficients.csv"):
    config = parse_config({"survey": {"kind": "magnetic"}, "diurnal": {"remote_reference": reference}})
    return StageContext(config=config, survey=Survey(tmp_path), table=table)


def _survey_table():
    t = np.datetime64("2025-05-10T06:00", "ns") + np.arange(0, 3600, 10).astype("timedelta64[s]")
    n = t.size
    return pd.DataFrame(
        {
            "time": t,
            "longitude": np.full(n, 145.6),
            "latitude": np.full(n, -32.4),
            "height": np.full(n, 300.0),
            "total_field": np.full(n, 57000.0),
            "line": "1010",
            "line_type": "traverse",
        }
    )


def test_uniform_external_field_projected_on_the_main_field(tmp_path):
    # A degree-1 zonal external potential V = q10 r cos(theta) is a uniform field -q10 z_hat
    # along the dipole axis (Chapman and Bartels 1940): X = -q10 sin(theta), Z = q10 cos(theta)
    # (geocentric north and down). Its total-field effect is its projection on F (Blakely 1995).
    minutes = np.datetime64("2025-05-10T05:00", "ns") + np.arange(180).astype("timedelta64[m]")
    q10 = 20.0 + 10.0 * np.sin(np.arange(180) / 30.0)
    coef = pd.DataFrame(
        {"time": pd.to_datetime(minutes).strftime("%Y-%m-%dT%H:%M:%SZ"), "q10": q10, "q11": 0.0, "s11": 0.0}
    )
    coef.to_csv(tmp_path / "coefficients.csv", index=False)
    table = _survey_table()
    out = diurnal.run(_context(tmp_path, table))
    theta = np.radians(90.0 + 32.4)  # colatitude (geocentric latitude differs by < 0.2 deg)
    q = np.interp(table["time"].to_numpy().astype("int64"), minutes.astype("int64"), q10)
    main = igrf(145.6, -32.4, 300.0, table["time"].to_numpy())
    expected = (-q * np.sin(theta) * main.north + q * np.cos(theta) * main.down) / main.total
    expected -= np.median(expected)
    # bound 0.05 nT: the 0.2 deg geodetic/geocentric rotation of a 30 nT field is 0.1 nT at most,
    # and it is nearly constant over an hour (removed with the median datum)
    np.testing.assert_allclose(out.table["diurnal"], expected, atol=0.05)
    assert not out.table["flag_base_gap"].any()
    assert any("remote reference" in w for w in out.warnings)


def test_missing_table_is_a_clear_error(tmp_path):
    with pytest.raises(InputDataError, match="diurnal.remote_reference"):
        diurnal.run(_context(tmp_path, _survey_table(), reference="nope.csv"))
