"""End to end on the committed magnetic demo: the pipeline's numbers against the scenario truth.

Bounds follow from what the scenario injects (truth/parameters.json): sensor noise sigma
0.05 nT, per-line level errors of a few nT, a regional external variation seen identically by the
base station (so the diurnal correction leaves only a constant datum), and spikes and gaps that
are flagged.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from .demo_run import readings_with_truth, run_demo


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    root, summary = run_demo("magnetic", tmp_path_factory.mktemp("mag"), until="level")
    return root, summary, readings_with_truth(root)


def _usable(frame):
    flags = [c for c in frame.columns if c.startswith("flag_")]
    return ~frame[flags].any(axis=1).to_numpy()


def test_spikes_are_flagged(demo):
    _, _, m = demo
    injected = m["spike"].to_numpy() != 0
    # every injected spike is flagged; almost nothing else is (robust spike test)
    assert m.loc[injected, "flag_spike"].all()
    assert m.loc[~injected, "flag_spike"].mean() < 0.001


def test_anomaly_after_diurnal_and_igrf(demo):
    root, _, m = demo
    ok = _usable(m)
    # anomaly = crustal + level error + constant datum + noise: the base sees the same external
    # field, so after removing it only its datum (base median + the base's own crustal value)
    # is left. Bound: 3 x the 0.05 nT sensor noise (normal noise: 3 sigma).
    residual = (m["anomaly"] - m["crustal_anomaly"] - m["level_error"])[ok]
    assert residual.std() < 0.15
    # IGRF: our synthesis against the generator's (which is the same code, itself checked
    # against ppigrf in tests/reference/test_igrf_ppigrf.py)
    assert np.nanmax(np.abs(m["igrf"] - m["igrf_total"])) < 0.01


def test_levelling_recovers_line_errors(demo):
    root, summary, m = demo
    ok = _usable(m)
    params = json.loads((root / "truth" / "parameters.json").read_text())
    injected = np.std([v["level_error_nT"] for v in params["lines"].values()])
    residual = (m["anomaly_levelled"] - m["crustal_anomaly"])[ok]
    # Each line's correction rests on >= 3 crossovers of two noisy lines: error per line about
    # sqrt(2) x 0.05 nT / sqrt(3) plus the tie-line errors (the same order): bound 0.3 nT,
    # against injected level errors of several nT.
    assert injected > 2.0
    assert residual.std() < 0.3
    metrics = summary.manifest["stages"]["level"]["metrics"]
    before = metrics.get("crossover_rms_before")
    after = metrics.get("crossover_rms_after")
    assert before / after >= 5.0  # issue requirement: crossover RMS drops at least 5 times


def test_no_spec_check_fails_on_the_demo(demo):
    _, summary, _ = demo
    assert [c["check"] for c in summary.failed_checks] == []
