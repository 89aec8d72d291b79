"""The gravity demo makes a solvable, in-spec survey for every seed (seeds 0-19).

Each seed's survey is generated and run through the drift stage (network adjustment with the
tare that cuts a loop into segments, Hinze, von Frese and Saad 2013, Gravity and Magnetic
Exploration, CUP); a few seeds also through the reference stage. The spec tolerances are the
drift stage's defaults (common practice for ground gravity loops: drift rate 0.05 mGal/h,
repeats and residual closure 0.03 mGal). The adjustment itself is checked against numpy least
squares and analytic networks in tests/fields/gravity/test_network.py.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from potfield.demo import make_demo
from potfield.pipeline import run_survey


def _run(tmp_path, seed, until):
    folder = make_demo("gravity", tmp_path / f"seed{seed}", seed=seed)
    summary = run_survey(folder, until=until)
    return folder, summary


@pytest.mark.parametrize("seed", range(20))
def test_every_seed_adjusts_within_spec(tmp_path, seed):
    folder, summary = _run(tmp_path, seed, "drift")
    assert [c["check"] for c in summary.failed_checks] == []
    names = {c["check"] for c in summary.checks}
    assert {"gravity_drift_rate", "gravity_repeat_difference", "gravity_loop_closure"} <= names
    tables = folder / "out" / "tables"
    stations = pd.read_csv(tables / "stations.csv").merge(
        pd.read_csv(folder / "truth" / "stations_truth.csv"), on="station", suffixes=("", "_true")
    )
    # 5 uGal reading noise, every station tied: station gravity within 0.02 mGal RMS of the
    # truth (about 3x the adjustment's own standard deviations)
    error = stations["gravity"] - stations["g_true"]
    assert np.sqrt(np.mean(error**2)) < 0.02
    # the 0.08 mGal tare is found in the loop it cuts, within 4 of its standard deviations
    params = json.loads((folder / "truth" / "parameters.json").read_text())
    tares = pd.read_csv(tables / "tares.csv")
    assert len(tares) == 1 and bool(tares["estimated"].iloc[0])
    step, sigma = tares["step_mgal"].iloc[0], tares["sigma_mgal"].iloc[0]
    assert abs(step - params["meter"]["tare_mGal"]) < 4 * sigma
    assert (tables / "segments.csv").is_file()


@pytest.mark.parametrize("seed", [2, 7])
def test_seeds_run_through_the_reference_stage(tmp_path, seed):
    # seeds 2 and 7 once failed in the drift stage (a tare with no reread station)
    _, summary = _run(tmp_path, seed, "reference")
    assert [c["check"] for c in summary.failed_checks] == []
    assert summary.manifest["stages"]["reference"]["metrics"]
