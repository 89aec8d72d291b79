"""Determinism of deliverables: the same inputs in two different folders give byte-identical
outputs (tables, grids, maps, report), apart from manifest.json, which alone records times.

Reproducible outputs are common practice for auditable processing (a client re-running a job
must get the same files); the NetCDF check also follows CF Conventions 1.8 sec. 2.6.2, where
``history`` is an audit trail, here without wall-clock stamps.
"""

from __future__ import annotations

from pathlib import Path

from potfield.cli import main
from potfield.pipeline import run_survey
from potfield.synthetic import write_synthetic_survey

FAST = ("[grid]\ntrial_depths = [4.5]\ntrial_dampings = [0.01]\n", "[report]\ndpi = 40\n")


def _survey(root: Path) -> Path:
    assert main(["new", str(root), "--kind", "magnetic"]) == 0
    write_synthetic_survey(root, readings=3_000, seed=2)
    text = (root / "survey.toml").read_text()
    text = text.replace("[grid]\n", FAST[0], 1).replace("[report]\n", FAST[1], 1)
    text = text.replace('method = "both"', 'method = "upward"')
    text = text.replace(
        'products = ["reduced_to_pole", "vertical_derivative", "second_vertical_derivative",\n'
        '            "x_derivative", "y_derivative", "total_horizontal_gradient", "analytic_signal",\n'
        '            "tilt_angle", "upward_continuation"]',
        'products = ["vertical_derivative", "upward_continuation"]',
    )
    (root / "survey.toml").write_text(text)
    return root


def _outputs(root: Path) -> dict[str, bytes]:
    out = root / "out"
    files = {}
    for path in sorted(out.rglob("*")):
        rel = path.relative_to(out).as_posix()
        if (
            path.is_file()
            and not rel.startswith("cache/")
            and rel != "manifest.json"
            and not rel.endswith(".lock")
        ):
            files[rel] = path.read_bytes()
    return files


def test_two_folders_give_byte_identical_outputs(tmp_path):
    first = _survey(tmp_path / "a" / "survey")
    second = _survey(tmp_path / "b" / "survey")  # same name: potfield new names the survey after it
    assert (first / "raw" / "lines.csv").read_bytes() == (second / "raw" / "lines.csv").read_bytes()
    run_survey(first)
    run_survey(second)
    a, b = _outputs(first), _outputs(second)
    assert set(a) == set(b)
    # every kind of deliverable is covered by the comparison
    assert {
        "tables/readings.csv",
        "tables/readings.parquet",
        "tables/columns.csv",
        "report.html",
        "grids/products.nc",
        "grids/anomaly.nc",
    } <= set(a)
    assert any(name.startswith("maps/") for name in a)
    different = sorted(name for name in a if a[name] != b[name])
    assert different == []
    # no wall-clock time in the page (manifest.json holds it)
    import json

    updated = json.loads((first / "out" / "manifest.json").read_text())["updated"]
    assert updated[:10].encode() not in a["report.html"]
    # the profile's grid-residual tolerance is checked, not only listed (airborne-magnetic profile)
    assert b"grid residual RMS" in a["tables/checks.csv"]
    # the data dictionary describes every column the run wrote (registry in potfield.io.columns)
    assert b"not described yet" not in a["tables/columns.csv"]
