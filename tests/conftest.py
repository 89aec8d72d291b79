"""Shared fixtures: small survey folders made through the public entry points."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture
def magnetic_survey(tmp_path) -> Path:
    """A magnetic survey folder from the template with 6,000 synthetic readings in raw/."""
    from potfield.cli import main
    from potfield.synthetic import write_synthetic_survey

    root = tmp_path / "survey"
    assert main(["new", str(root), "--kind", "magnetic"]) == 0
    write_synthetic_survey(root, readings=6_000, seed=1)
    return root
