"""Run a committed demo survey (copied to a temporary folder) and join its outputs to the truth."""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd

from potfield.pipeline import run_survey

SURVEYS = Path(__file__).resolve().parents[2] / "surveys"


def run_demo(kind: str, tmp: Path, until: str | None = None):
    root = tmp / f"demo-{kind}"
    shutil.copytree(SURVEYS / f"demo-{kind}", root, ignore=shutil.ignore_patterns("out"))
    summary = run_survey(root, until=until)
    return root, summary


def readings_with_truth(root: Path) -> pd.DataFrame:
    readings = pd.read_csv(root / "out" / "tables" / "readings.csv", low_memory=False)
    truth = pd.read_csv(root / "truth" / "readings_truth.csv")
    return readings.merge(truth, on=["source_file", "source_row"], suffixes=("", "_truth"))
