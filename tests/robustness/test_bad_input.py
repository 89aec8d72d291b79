"""Bad-input corpus: each case is one small mutation of a valid invented survey folder.

Every case must end the command line with exit code 2, no traceback, exactly one line on
stderr, and that line must name what is wrong (the key, the file and/or the line). This is the
project's error contract (DEVELOPERS.md, "Errors"); the valid folders are invented data from
potfield.synthetic and potfield.demo, so each mutation is the only thing wrong.

Cases are (id, kind, command, mutations, expected substrings). Most run ``check`` (config and
ingest); a few need a later stage and run ``run --until STAGE``.
"""

from __future__ import annotations

import gzip
import shutil
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from potfield.cli import main

# --- valid base folders (built once per session) ----------------------------------------------

MAG_BASE = """
[[diurnal.bases]]
name = "strip base"
file = "raw/base.csv"
format = "delimited"
longitude = 138.01
latitude = -33.01
delimiter = ","

[diurnal.bases.columns]
date = "DATE"
time = "SOD"
total_field = "BASEMAG"

[diurnal.bases.time]
format = "date_seconds"
"""


def _magnetic(root: Path) -> None:
    from potfield.synthetic import write_synthetic_survey

    assert main(["new", str(root), "--kind", "magnetic"]) == 0
    write_synthetic_survey(root, readings=300, seed=3)
    text = (root / "survey.toml").read_text().replace('files = ["raw/*.csv"]', 'files = ["raw/lines.csv"]')
    (root / "survey.toml").write_text(text + MAG_BASE)
    seconds = np.arange(3500.0, 5600.0)
    field = 57000.0 + 3.0 * np.sin(seconds / 300.0)
    pd.DataFrame({"DATE": "2024-05-01", "SOD": seconds, "BASEMAG": np.round(field, 2)}).to_csv(
        root / "raw" / "base.csv", index=False
    )


def _gravity(root: Path) -> None:
    from potfield.demo import make_demo

    make_demo("gravity", root, seed=0)


def _observatory(root: Path) -> None:
    from potfield.demo import make_demo

    make_demo("observatory", root, seed=0)
    files = sorted((root / "raw").glob("*.min"))
    days = sorted({p.name[3:11] for p in files})
    for path in files:  # keep one day, 120 minutes per station: enough for ingest and clean
        if path.name[3:11] != days[0]:
            path.unlink()
            continue
        lines = path.read_text().splitlines(True)
        start = next(i for i, line in enumerate(lines) if line.startswith("DATE"))
        path.write_text("".join(lines[: start + 121]))


BUILDERS = {"magnetic": _magnetic, "gravity": _gravity, "observatory": _observatory}
VALID_STAGE = {"magnetic": "diurnal", "gravity": "drift", "observatory": "clean"}


@pytest.fixture(scope="module")
def bases(tmp_path_factory):
    folders = {}
    for kind, build in BUILDERS.items():
        root = tmp_path_factory.mktemp(f"base-{kind}") / "survey"
        build(root)
        folders[kind] = root
    return folders


# --- mutations -------------------------------------------------------------------------------

DELETE = object()


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return (
            "inf"
            if value == np.inf
            else "-inf"
            if value == -np.inf
            else "nan"
            if np.isnan(value)
            else repr(value)
        )
    if isinstance(value, int):
        return str(value)
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f'"{k}" = {_toml_value(v)}' for k, v in value.items()) + "}"
    raise TypeError(value)


def dump_toml(data: dict, prefix: str = "") -> str:
    """A small TOML writer for the test's configs (tables, arrays of tables, scalars, lists)."""
    out, tables = [], []
    for key, value in data.items():
        if isinstance(value, dict) or (
            isinstance(value, list) and value and all(isinstance(v, dict) for v in value)
        ):
            tables.append((key, value))
        else:
            out.append(f'"{key}" = {_toml_value(value)}')
    text = "".join(line + "\n" for line in out)
    for key, value in tables:
        name = f"{prefix}.{key}" if prefix else key
        if isinstance(value, list):
            for item in value:
                text += f"\n[[{name}]]\n" + dump_toml(item, name)
        else:
            text += f"\n[{name}]\n" + dump_toml(value, name)
    return text


def cfg(key: str, value):
    """Set (or with DELETE remove) a survey.toml key given as a dotted path (ints index lists)."""

    def apply(root: Path) -> None:
        path = root / "survey.toml"
        data = tomllib.loads(path.read_text())
        parts = [int(p) if p.isdigit() else p for p in key.split(".")]
        node = data
        for part in parts[:-1]:
            if isinstance(part, str) and part not in node:
                node[part] = {}
            node = node[part]
        if value is DELETE:
            node.pop(parts[-1], None)
        else:
            node[parts[-1]] = value
        path.write_text(dump_toml(data))

    return apply


def edit(name: str, func):
    """Replace the bytes of a file under the survey folder by func(bytes)."""

    def apply(root: Path) -> None:
        path = root / name
        path.write_bytes(func(path.read_bytes()))

    return apply


def cell(name: str, row: int, column: str, value: str, sep: str = ","):
    """Set one field of a delimited file (row = 0-based data row, i.e. file line row + 2)."""

    def func(data: bytes) -> bytes:
        lines = data.decode("utf-8").split("\n")
        header = lines[0].split(sep)
        fields = lines[row + 1].split(sep)
        fields[header.index(column)] = value
        lines[row + 1] = sep.join(fields)
        return "\n".join(lines).encode("utf-8")

    return edit(name, func)


def column(name: str, col: str, value: str, sep: str = ","):
    """Set every field of one column of a delimited file."""

    def func(data: bytes) -> bytes:
        lines = data.decode("utf-8").rstrip("\n").split("\n")
        index = lines[0].split(sep).index(col)
        rows = [lines[0]]
        for line in lines[1:]:
            fields = line.split(sep)
            fields[index] = value
            rows.append(sep.join(fields))
        return ("\n".join(rows) + "\n").encode("utf-8")

    return edit(name, func)


def keep_lines(name: str, n: int):
    return edit(name, lambda data: b"".join(data.splitlines(True)[:n]))


def line_edit(name: str, number: int, func):
    """Replace file line ``number`` (1-based) by func(line bytes without the newline)."""

    def apply(data: bytes) -> bytes:
        lines = data.split(b"\n")
        lines[number - 1] = func(lines[number - 1])
        return b"\n".join(lines)

    return edit(name, apply)


def write(name: str, data: bytes):
    def apply(root: Path) -> None:
        (root / name).write_bytes(data)

    return apply


def remove(name: str):
    def apply(root: Path) -> None:
        (root / name).unlink()

    return apply


def obstruct(name: str):
    """Put a plain file where potfield must create a folder (out/ cannot be written)."""

    def apply(root: Path) -> None:
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("not a folder")

    return apply


def iaga_header(station: str, label: str, value: str):
    """Replace the value of one IAGA-2002 header record (column 25 to the '|')."""

    def func(data: bytes) -> bytes:
        lines = data.decode("ascii").split("\n")
        for i, line in enumerate(lines):
            if line[1:24].strip().lower() == label.lower():
                lines[i] = (line[:24] + value).ljust(69)[:69] + "|"
        return "\n".join(lines).encode("ascii")

    return edit_glob(station, func)


def edit_glob(pattern: str, func):
    def apply(root: Path) -> None:
        path = min((root / "raw").glob(pattern))
        path.write_bytes(func(path.read_bytes()))

    return apply


def iaga_record(station: str, index: int, func):
    """Replace data record ``index`` (0-based after the data header) of a station's file."""

    def apply(data: bytes) -> bytes:
        lines = data.split(b"\n")
        start = next(i for i, line in enumerate(lines) if line.startswith(b"DATE"))
        lines[start + 1 + index] = func(lines[start + 1 + index])
        return b"\n".join(lines)

    return edit_glob(station, apply)


def iaga_values(pattern: str, value: bytes):
    """Every data value of the matching files set to ``value`` (10 characters)."""

    def func(data: bytes) -> bytes:
        lines = data.split(b"\n")
        start = next(i for i, line in enumerate(lines) if line.startswith(b"DATE"))
        for i in range(start + 1, len(lines)):
            if lines[i].strip():
                lines[i] = lines[i][:30] + value * 4
        return b"\n".join(lines)

    def apply(root: Path) -> None:
        for path in sorted((root / "raw").glob(pattern)):
            path.write_bytes(func(path.read_bytes()))

    return apply


L, M, B = "raw/lines.csv", "survey.toml", "raw/base.csv"
G, C = "raw/gravity_readings.csv", "raw/calibration.csv"
CHECK = ("check",)


def until(stage: str) -> tuple:
    return ("run", "--until", stage)


# (id, kind, command, mutations, substrings the one-line message must contain)
CASES = [
    # -- magnetic: survey.toml numbers and lists ------------------------------------------------
    ("mag-spike-window-0", "magnetic", CHECK, [cfg("clean.spike_window", 0)], ["clean.spike_window", ">= 3"]),
    (
        "mag-spike-threshold-neg",
        "magnetic",
        CHECK,
        [cfg("clean.spike_threshold", -2.0)],
        ["clean.spike_threshold"],
    ),
    ("mag-spike-min-neg", "magnetic", CHECK, [cfg("clean.spike_min", -1.0)], ["clean.spike_min"]),
    ("mag-time-gap-neg", "magnetic", CHECK, [cfg("clean.max_time_gap_s", -1.0)], ["clean.max_time_gap_s"]),
    (
        "mag-distance-gap-neg",
        "magnetic",
        CHECK,
        [cfg("clean.max_distance_gap_m", -3.0)],
        ["clean.max_distance_gap_m"],
    ),
    (
        "mag-height-band",
        "magnetic",
        CHECK,
        [cfg("clean.height_min", 500.0), cfg("clean.height_max", 100.0)],
        ["height_min 500", "height_max 100"],
    ),
    ("mag-cv-folds-0", "magnetic", CHECK, [cfg("grid.cv_folds", 0)], ["grid.cv_folds"]),
    (
        "mag-dampings-empty",
        "magnetic",
        CHECK,
        [cfg("grid.trial_dampings", [])],
        ["grid.trial_dampings", "at least 1"],
    ),
    (
        "mag-dampings-negative",
        "magnetic",
        CHECK,
        [cfg("grid.trial_dampings", [1e-3, -1.0])],
        ["grid.trial_dampings"],
    ),
    ("mag-depth-factors-empty", "magnetic", CHECK, [cfg("grid.trial_depths", [])], ["grid.trial_depths"]),
    ("mag-depth-factor-zero", "magnetic", CHECK, [cfg("grid.trial_depths", [0.0])], ["grid.trial_depths"]),
    ("mag-spacing-neg", "magnetic", CHECK, [cfg("grid.spacing_m", -50.0)], ["grid.spacing_m"]),
    ("mag-block-neg", "magnetic", CHECK, [cfg("grid.block_m", -1.0)], ["grid.block_m"]),
    ("mag-mask-neg", "magnetic", CHECK, [cfg("grid.mask_distance_m", -5.0)], ["grid.mask_distance_m"]),
    ("mag-tile-neg", "magnetic", CHECK, [cfg("grid.tile_size_m", -5.0)], ["grid.tile_size_m"]),
    ("mag-grid-tolerance", "magnetic", CHECK, [cfg("grid.tolerance", 2.0)], ["grid.tolerance"]),
    ("mag-grid-height-word", "magnetic", CHECK, [cfg("grid.height", "dreap")], ["grid.height", "drape"]),
    ("mag-grid-height-inf", "magnetic", CHECK, [cfg("grid.height", float("inf"))], ["grid.height"]),
    ("mag-skip-rows-neg", "magnetic", CHECK, [cfg("input.skip_rows", -1)], ["input.skip_rows"]),
    ("mag-delimiter-empty", "magnetic", CHECK, [cfg("input.delimiter", "")], ["input.delimiter", "empty"]),
    ("mag-delimiter-long", "magnetic", CHECK, [cfg("input.delimiter", ",,")], ["input.delimiter"]),
    ("mag-files-empty", "magnetic", CHECK, [cfg("input.files", [])], ["input.files"]),
    ("mag-files-blank", "magnetic", CHECK, [cfg("input.files", [""])], ["input.files", "empty"]),
    ("mag-split-gap-neg", "magnetic", CHECK, [cfg("lines.split_gap_s", -60.0)], ["lines.split_gap_s"]),
    ("mag-tie-min-inf", "magnetic", CHECK, [cfg("lines.tie_min", float("inf"))], ["lines.tie_min", "finite"]),
    (
        "mag-geoid-inf",
        "magnetic",
        CHECK,
        [cfg("survey.geoid_undulation", float("inf"))],
        ["survey.geoid_undulation"],
    ),
    (
        "mag-geoid-huge",
        "magnetic",
        CHECK,
        [cfg("survey.geoid_undulation", 5000.0)],
        ["survey.geoid_undulation"],
    ),
    ("mag-diurnal-gap-0", "magnetic", CHECK, [cfg("diurnal.max_gap_s", 0.0)], ["diurnal.max_gap_s"]),
    (
        "mag-diurnal-power-neg",
        "magnetic",
        CHECK,
        [cfg("diurnal.distance_power", -1.0)],
        ["diurnal.distance_power"],
    ),
    ("mag-diurnal-window-1", "magnetic", CHECK, [cfg("diurnal.spike_window", 1)], ["diurnal.spike_window"]),
    (
        "mag-diurnal-radius-0",
        "magnetic",
        CHECK,
        [cfg("diurnal.offset_radius_m", 0.0)],
        ["diurnal.offset_radius_m"],
    ),
    ("mag-datum-time-word", "magnetic", CHECK, [cfg("diurnal.datum_time", "noon")], ["diurnal.datum_time"]),
    (
        "mag-base-lat-95",
        "magnetic",
        CHECK,
        [cfg("diurnal.bases.0.latitude", 95.0)],
        ["diurnal.bases.0.latitude"],
    ),
    (
        "mag-base-lon-500",
        "magnetic",
        CHECK,
        [cfg("diurnal.bases.0.longitude", 500.0)],
        ["diurnal.bases.0.longitude"],
    ),
    ("mag-base-name-empty", "magnetic", CHECK, [cfg("diurnal.bases.0.name", "")], ["diurnal.bases.0.name"]),
    (
        "mag-base-skip-neg",
        "magnetic",
        CHECK,
        [cfg("diurnal.bases.0.skip_rows", -2)],
        ["diurnal.bases.0.skip_rows"],
    ),
    (
        "mag-base-delimiter-empty",
        "magnetic",
        CHECK,
        [cfg("diurnal.bases.0.delimiter", "")],
        ["diurnal.bases.0.delimiter"],
    ),
    ("mag-min-crossovers-0", "magnetic", CHECK, [cfg("level.min_crossovers", 0)], ["level.min_crossovers"]),
    (
        "mag-level-height-neg",
        "magnetic",
        CHECK,
        [cfg("level.max_height_difference_m", -1.0)],
        ["level.max_height_difference_m"],
    ),
    ("mag-dpi-0", "magnetic", CHECK, [cfg("report.dpi", 0)], ["report.dpi"]),
    (
        "mag-regional-neg",
        "magnetic",
        CHECK,
        [cfg("separate.regional_height_m", -100.0)],
        ["separate.regional_height_m"],
    ),
    ("mag-upward-0", "magnetic", CHECK, [cfg("derive.upward_m", 0)], ["derive.upward_m"]),
    (
        "mag-product-typo",
        "magnetic",
        CHECK,
        [cfg("derive.products", ["rpt"])],
        ["derive.products", "did you mean 'reduced_to_pole'"],
    ),
    (
        "mag-igrf-date-word",
        "magnetic",
        CHECK,
        [cfg("reference.igrf_date", "last year")],
        ["reference.igrf_date", "YYYY-MM-DD"],
    ),
    (
        "mag-time-date-bad",
        "magnetic",
        CHECK,
        [cfg("input.time.date", "2024-13-45")],
        ["input.time.date", "YYYY-MM-DD"],
    ),
    ("mag-time-format", "magnetic", CHECK, [cfg("input.time.format", "unix")], ["input.time.format"]),
    (
        "mag-encoding-unknown",
        "magnetic",
        CHECK,
        [cfg("input.encoding", "klingon")],
        ["input.encoding", "klingon"],
    ),
    (
        "mag-missing-values-text",
        "magnetic",
        CHECK,
        [cfg("input.missing_values", "*")],
        ["input.missing_values"],
    ),
    (
        "mag-wrong-type",
        "magnetic",
        CHECK,
        [cfg("clean.spike_window", "eleven")],
        ["clean.spike_window", "integer"],
    ),
    ("mag-unknown-key", "magnetic", CHECK, [cfg("clean.spike_windw", 11)], ["did you mean 'spike_window'"]),
    (
        "mag-unknown-section",
        "magnetic",
        CHECK,
        [cfg("diurnall", {"datum": "median"})],
        ["did you mean 'diurnal'"],
    ),
    ("mag-kind-typo", "magnetic", CHECK, [cfg("survey.kind", "magnetik")], ["survey.kind"]),
    ("mag-kind-missing", "magnetic", CHECK, [cfg("survey.kind", DELETE)], ["survey.kind", "required"]),
    ("mag-unit-unknown", "magnetic", CHECK, [cfg("input.units.total_field", "gauss")], ["unit 'gauss'"]),
    (
        "mag-column-typo",
        "magnetic",
        CHECK,
        [cfg("input.columns.totalfield", "TMI")],
        ["did you mean 'total_field'"],
    ),
    (
        "mag-spec-missing",
        "magnetic",
        CHECK,
        [cfg("survey.spec", "no-such-profile")],
        ["survey.spec", "no-such-profile"],
    ),
    (
        "mag-spec-override-typo",
        "magnetic",
        CHECK,
        [cfg("survey.spec_overrides", {"noise_fourth_diference_nT": 0.2})],
        ["survey.spec_overrides", "did you mean 'noise_fourth_difference_nT'"],
    ),
    (
        "mag-spec-override-inf",
        "magnetic",
        CHECK,
        [cfg("survey.spec_overrides", {"noise_fourth_difference_nT": float("inf")})],
        ["survey.spec_overrides"],
    ),
    (
        "mag-output-crs-geographic",
        "magnetic",
        CHECK,
        [cfg("survey.output_crs", "EPSG:4326")],
        ["survey.output_crs", "projected"],
    ),
    (
        "mag-output-crs-feet",
        "magnetic",
        CHECK,
        [cfg("survey.output_crs", "EPSG:2277")],
        ["survey.output_crs", "metres"],
    ),
    (
        "mag-output-crs-unknown",
        "magnetic",
        CHECK,
        [cfg("survey.output_crs", "EPSG:999999")],
        ["survey.output_crs", "EPSG:999999"],
    ),
    ("mag-crs-unknown", "magnetic", CHECK, [cfg("survey.crs", "EPSG:999999")], ["survey.crs"]),
    (
        "mag-drift-section",
        "magnetic",
        CHECK,
        [cfg("drift.calibration_file", "raw/cal.csv")],
        ["drift.calibration_file", "gravity"],
    ),
    (
        "mag-drift-bases",
        "magnetic",
        CHECK,
        [cfg("drift.bases", [{"station": "B1", "gravity": 979000.0}])],
        ["drift.bases", "gravity"],
    ),
    (
        "mag-gravity-value",
        "magnetic",
        CHECK,
        [cfg("input.columns.total_field", DELETE), cfg("input.columns.reading", "TMI")],
        ["input.columns.total_field", "'reading'"],
    ),
    (
        "mag-no-value",
        "magnetic",
        CHECK,
        [cfg("input.columns.total_field", DELETE)],
        ["input.columns.total_field"],
    ),
    (
        "mag-column-missing",
        "magnetic",
        CHECK,
        [cfg("input.columns.total_field", "MAG")],
        ["input.columns.total_field", "'MAG'"],
    ),
    (
        "mag-files-nomatch",
        "magnetic",
        CHECK,
        [cfg("input.files", ["raw/flight*.csv"])],
        ["input.files", "raw/flight*.csv"],
    ),
    (
        "mag-file-missing",
        "magnetic",
        CHECK,
        [cfg("input.files", ["raw/flight1.csv"])],
        ["flight1.csv", "file not found"],
    ),
    ("mag-tie-pattern", "magnetic", CHECK, [cfg("lines.tie_pattern", "[9")], ["lines.tie_pattern"]),
    ("mag-igrf-1850", "magnetic", until("reference"), [cfg("reference.igrf_date", "1850-01-01")], ["1900"]),
    (
        "mag-datum-value-missing",
        "magnetic",
        until("diurnal"),
        [cfg("diurnal.datum", "value")],
        ["diurnal.datum_value"],
    ),
    # -- magnetic: survey.toml bytes ------------------------------------------------------------
    (
        "mag-toml-latin1",
        "magnetic",
        CHECK,
        [edit(M, lambda d: b"# Relev\xe9 a\xe9rien\n" + d)],
        ["survey.toml", "line 1", "column 8", "byte offset 7", "0xe9", "UTF-8"],
    ),
    (
        "mag-toml-syntax",
        "magnetic",
        CHECK,
        [edit(M, lambda d: d.replace(b"[clean]", b"[clean", 1))],
        ["survey.toml", "not valid TOML"],
    ),
    ("mag-toml-empty", "magnetic", CHECK, [write(M, b"")], ["survey", "required"]),
    ("mag-toml-binary", "magnetic", CHECK, [write(M, bytes(range(256)))], ["survey.toml"]),
    # -- magnetic: the readings file ------------------------------------------------------------
    (
        "mag-encoding-declared",
        "magnetic",
        CHECK,
        [cfg("input.encoding", "ascii"), cell(L, 3, "line", "1010\u00e9")],
        ["lines.csv", "line 5", "input.encoding"],
    ),
    (
        "mag-value-inf",
        "magnetic",
        CHECK,
        [cell(L, 3, "total_field_nT", "inf")],
        ["lines.csv", "total_field", "line 5", "finite"],
    ),
    (
        "mag-value-overflow",
        "magnetic",
        CHECK,
        [cell(L, 6, "total_field_nT", "1e400")],
        ["lines.csv", "total_field", "line 8"],
    ),
    (
        "mag-lat-minus-inf",
        "magnetic",
        CHECK,
        [cell(L, 2, "latitude", "-inf")],
        ["lines.csv", "latitude", "line 4"],
    ),
    (
        "mag-lon-500",
        "magnetic",
        CHECK,
        [cell(L, 4, "longitude", "500")],
        ["lines.csv", "longitude 500", "line 6"],
    ),
    (
        "mag-lat-123",
        "magnetic",
        CHECK,
        [cell(L, 7, "latitude", "123")],
        ["lines.csv", "latitude 123", "line 9"],
    ),
    (
        "mag-lon-blank",
        "magnetic",
        CHECK,
        [cell(L, 9, "longitude", "")],
        ["lines.csv", "longitude is missing", "line 11"],
    ),
    ("mag-height-inf", "magnetic", CHECK, [cell(L, 1, "height_m", "inf")], ["lines.csv", "height", "line 3"]),
    (
        "mag-all-values-missing",
        "magnetic",
        CHECK,
        [column(L, "total_field_nT", "")],
        ["every total_field value is missing"],
    ),
    (
        "mag-all-values-sentinel",
        "magnetic",
        CHECK,
        [column(L, "total_field_nT", "*")],
        ["every total_field value is missing"],
    ),
    (
        "mag-two-readings",
        "magnetic",
        CHECK,
        [keep_lines(L, 3)],
        ["lines.csv", "too few readings to process: 2"],
    ),
    ("mag-one-reading", "magnetic", CHECK, [keep_lines(L, 2)], ["too few readings to process: 1"]),
    ("mag-header-only", "magnetic", CHECK, [keep_lines(L, 1)], ["lines.csv", "no data rows"]),
    ("mag-empty-file", "magnetic", CHECK, [write(L, b"")], ["lines.csv", "file is empty"]),
    ("mag-blank-file", "magnetic", CHECK, [write(L, b"\n\n  \n")], ["lines.csv", "empty"]),
    (
        "mag-lines-blank",
        "magnetic",
        CHECK,
        [column(L, "line", "")],
        ["lines.csv", "line name is blank", "line 2"],
    ),
    (
        "mag-line-blank",
        "magnetic",
        CHECK,
        [cell(L, 10, "line", " ")],
        ["lines.csv", "line name is blank", "line 12"],
    ),
    (
        "mag-ragged-more",
        "magnetic",
        CHECK,
        [line_edit(L, 5, lambda b: b + b",17")],
        ["lines.csv", "line 5", "7 field(s)", "has 6"],
    ),
    (
        "mag-ragged-fewer",
        "magnetic",
        CHECK,
        [line_edit(L, 7, lambda b: b.rsplit(b",", 1)[0])],
        ["lines.csv", "line 7", "5 field(s)"],
    ),
    (
        "mag-non-numeric",
        "magnetic",
        CHECK,
        [cell(L, 4, "total_field_nT", "bad")],
        ["non-numeric value 'bad'", "line 6"],
    ),
    (
        "mag-time-word",
        "magnetic",
        CHECK,
        [cell(L, 2, "time_utc", "yesterday noon")],
        ["cannot read the time 'yesterday noon'", "line 4"],
    ),
    (
        "mag-time-1500",
        "magnetic",
        CHECK,
        [cell(L, 3, "time_utc", "1500-01-01T00:00:00Z")],
        ["lines.csv", "line 5"],
    ),
    (
        "mag-time-month-13",
        "magnetic",
        CHECK,
        [cell(L, 3, "time_utc", "2024-13-01T00:00:00Z")],
        ["lines.csv", "line 5"],
    ),
    (
        "mag-header-renamed",
        "magnetic",
        CHECK,
        [edit(L, lambda d: d.replace(b"time_utc", b"time_x", 1))],
        ["'time_utc'", "input.columns.time"],
    ),
    ("mag-wrong-delimiter", "magnetic", CHECK, [cfg("input.delimiter", ";")], ["lines.csv", "input.columns"]),
    ("mag-skip-all", "magnetic", CHECK, [cfg("input.skip_rows", 100000)], ["lines.csv", "no header line"]),
    ("mag-binary-file", "magnetic", CHECK, [write(L, bytes(range(256)) * 4)], ["lines.csv"]),
    (
        "mag-gzip-broken",
        "magnetic",
        CHECK,
        [
            cfg("input.files", ["raw/lines.csv.gz"]),
            write("raw/lines.csv.gz", gzip.compress(b"LINE,UTC\n" * 50)[:40]),
        ],
        ["lines.csv.gz"],
    ),
    (
        "mag-date-seconds-nodate",
        "magnetic",
        CHECK,
        [cfg("input.time.format", "date_seconds")],
        ["input.time.date"],
    ),
    (
        "mag-seconds-huge",
        "magnetic",
        CHECK,
        [
            cfg("input.time.format", "date_seconds"),
            cfg("input.time.date", "2024-05-01"),
            column(L, "time_utc", "1e30"),
        ],
        ["lines.csv", "date_seconds", "line 2"],
    ),
    # -- magnetic: the base-station file (diurnal stage) --------------------------------------
    ("mag-base-missing", "magnetic", until("diurnal"), [remove(B)], ["base.csv", "not found"]),
    ("mag-base-empty", "magnetic", until("diurnal"), [write(B, b"")], ["base.csv", "empty"]),
    (
        "mag-base-column",
        "magnetic",
        until("diurnal"),
        [edit(B, lambda d: d.replace(b"BASEMAG", b"MAG", 1))],
        ["base.csv", "'BASEMAG'", "diurnal.bases[0].columns.total_field"],
    ),
    (
        "mag-base-ragged",
        "magnetic",
        until("diurnal"),
        [line_edit(B, 9, lambda b: b + b",1,2")],
        ["base.csv", "line 9"],
    ),
    (
        "mag-base-inf",
        "magnetic",
        until("diurnal"),
        [cell(B, 5, "BASEMAG", "inf")],
        ["base.csv", "line 7", "finite"],
    ),
    ("mag-base-time", "magnetic", until("diurnal"), [cell(B, 5, "SOD", "noon")], ["base.csv", "line 7"]),
    (
        "mag-base-encoding",
        "magnetic",
        until("diurnal"),
        [
            cfg("input.encoding", "ascii"),
            edit(B, lambda d: d.replace(b"DATE", "DAT\u00c9".encode("latin-1"), 1)),
        ],
        ["base.csv", "line 1", "input.encoding"],
    ),
    (
        "mag-base-all-missing",
        "magnetic",
        until("diurnal"),
        [column(B, "BASEMAG", "")],
        ["base.csv", "no usable total-field"],
    ),
    # -- magnetic: out/ cannot be written -----------------------------------------------------
    ("mag-out-is-file", "magnetic", until("ingest"), [obstruct("out")], ["cannot write to", "out"]),
    (
        "mag-tables-is-file",
        "magnetic",
        until("ingest"),
        [obstruct("out/tables")],
        ["cannot write to", "tables"],
    ),
    # -- gravity --------------------------------------------------------------------------------
    (
        "grav-reading-inf",
        "gravity",
        CHECK,
        [cell(G, 5, "reading_cu", "inf")],
        ["gravity_readings.csv", "reading", "line 7"],
    ),
    (
        "grav-lat-95",
        "gravity",
        CHECK,
        [cell(G, 8, "latitude", "95")],
        ["gravity_readings.csv", "latitude 95", "line 10"],
    ),
    (
        "grav-lon-500",
        "gravity",
        CHECK,
        [cell(G, 8, "longitude", "500")],
        ["gravity_readings.csv", "longitude 500", "line 10"],
    ),
    (
        "grav-lon-inf",
        "gravity",
        CHECK,
        [cell(G, 3, "longitude", "inf")],
        ["gravity_readings.csv", "longitude", "line 5"],
    ),
    (
        "grav-height-inf",
        "gravity",
        CHECK,
        [cell(G, 3, "height_m", "-inf")],
        ["gravity_readings.csv", "height", "line 5"],
    ),
    (
        "grav-time-bad",
        "gravity",
        CHECK,
        [cell(G, 11, "time_utc", "2025-13-01T00:00:00Z")],
        ["gravity_readings.csv", "line 13"],
    ),
    (
        "grav-all-readings-missing",
        "gravity",
        CHECK,
        [column(G, "reading_cu", "")],
        ["every reading value is missing"],
    ),
    ("grav-three-readings", "gravity", CHECK, [keep_lines(G, 4)], ["too few readings to process: 3"]),
    (
        "grav-ragged",
        "gravity",
        CHECK,
        [line_edit(G, 20, lambda b: b + b",x")],
        ["gravity_readings.csv", "line 20", "9 field(s)"],
    ),
    (
        "grav-encoding",
        "gravity",
        CHECK,
        [cfg("input.encoding", "ascii"), cell(G, 30, "station", "G\u00d801")],
        ["gravity_readings.csv", "line 32", "input.encoding"],
    ),
    (
        "grav-column-missing",
        "gravity",
        CHECK,
        [cfg("input.columns.reading", "TMI")],
        ["'TMI'", "input.columns.reading"],
    ),
    ("grav-no-reading", "gravity", CHECK, [cfg("input.columns.reading", DELETE)], ["input.columns.reading"]),
    (
        "grav-magnetic-kind",
        "gravity",
        CHECK,
        [cfg("survey.kind", "magnetic")],
        ["only used by gravity surveys", "survey.kind"],
    ),
    (
        "grav-magnetic-value",
        "gravity",
        CHECK,
        [
            cfg("input.columns.reading", DELETE),
            cfg("input.columns.total_field", "RDG"),
            cfg("input.units", {}),
        ],
        ["input.columns.reading", "'total_field'"],
    ),
    ("grav-unit", "gravity", CHECK, [cfg("input.units.reading", "mgal")], ["unit 'mgal'"]),
    (
        "grav-base-station-empty",
        "gravity",
        CHECK,
        [cfg("drift.bases.0.station", "")],
        ["drift.bases.0.station"],
    ),
    (
        "grav-base-gravity-inf",
        "gravity",
        CHECK,
        [cfg("drift.bases.0.gravity", float("inf"))],
        ["drift.bases.0.gravity"],
    ),
    (
        "grav-base-sigma-neg",
        "gravity",
        CHECK,
        [cfg("drift.bases.0.sigma_mgal", -0.01)],
        ["drift.bases.0.sigma_mgal"],
    ),
    ("grav-tare-word", "gravity", CHECK, [cfg("drift.tares", ["soon"])], ["drift.tares", "ISO 8601"]),
    (
        "grav-gravimetric-0",
        "gravity",
        CHECK,
        [cfg("drift.gravimetric_factor", 0.0)],
        ["drift.gravimetric_factor"],
    ),
    ("grav-sigma-0", "gravity", CHECK, [cfg("drift.reading_sigma_mgal", 0.0)], ["drift.reading_sigma_mgal"]),
    (
        "grav-free-air-neg",
        "gravity",
        CHECK,
        [cfg("drift.free_air_gradient", -0.3)],
        ["drift.free_air_gradient"],
    ),
    ("grav-density-0", "gravity", CHECK, [cfg("reference.density", 0.0)], ["reference.density"]),
    (
        "grav-terrain-radius-neg",
        "gravity",
        CHECK,
        [cfg("reference.terrain_radius_m", -1.0)],
        ["reference.terrain_radius_m"],
    ),
    (
        "grav-terrain-zones",
        "gravity",
        CHECK,
        [cfg("reference.terrain_inner_radius_m", 50000.0)],
        ["terrain_inner_radius_m 50000"],
    ),
    (
        "grav-output-crs-geographic",
        "gravity",
        CHECK,
        [cfg("survey.output_crs", "EPSG:4326")],
        ["survey.output_crs"],
    ),
    (
        "grav-diurnal-bases",
        "gravity",
        CHECK,
        [cfg("diurnal.bases", [{"name": "b", "file": "raw/b.csv"}])],
        ["diurnal.bases", "magnetic"],
    ),
    ("grav-calibration-missing", "gravity", until("drift"), [remove(C)], ["calibration.csv", "not found"]),
    # -- observatory ---------------------------------------------------------------------------
    (
        "obs-lat-95",
        "observatory",
        CHECK,
        [iaga_header("jqz*", "Geodetic Latitude", "95.000")],
        ["jqz", "Geodetic Latitude 95"],
    ),
    (
        "obs-lon-500",
        "observatory",
        CHECK,
        [iaga_header("jqz*", "Geodetic Longitude", "500.000")],
        ["jqz", "Geodetic Longitude 500"],
    ),
    (
        "obs-lat-word",
        "observatory",
        CHECK,
        [iaga_header("kqx*", "Geodetic Latitude", "north")],
        ["kqx", "line 5", "'north'"],
    ),
    (
        "obs-lat-inf",
        "observatory",
        CHECK,
        [iaga_header("kqx*", "Geodetic Latitude", "inf")],
        ["kqx", "line 5"],
    ),
    (
        "obs-value-inf",
        "observatory",
        CHECK,
        [iaga_record("jqz*", 3, lambda b: b[:-10] + b"       inf")],
        ["jqz", "line 20", "finite"],
    ),
    (
        "obs-value-word",
        "observatory",
        CHECK,
        [iaga_record("jqz*", 4, lambda b: b[:-10] + b"      n/a ")],
        ["jqz", "line 21"],
    ),
    (
        "obs-doy",
        "observatory",
        CHECK,
        [iaga_record("qzk*", 2, lambda b: b[:24] + b"999" + b[27:])],
        ["qzk", "line 19", "day of year"],
    ),
    (
        "obs-date",
        "observatory",
        CHECK,
        [iaga_record("qzk*", 2, lambda b: b"2025-02-30" + b[10:])],
        ["qzk", "line 19"],
    ),
    (
        "obs-extra-value",
        "observatory",
        CHECK,
        [iaga_record("vxq*", 5, lambda b: b + b"   1.00")],
        ["vxq", "line 22", "more than"],
    ),
    (
        "obs-short-record",
        "observatory",
        CHECK,
        [iaga_record("vxq*", 6, lambda b: b[:-10])],
        ["vxq", "line 23", "fewer than"],
    ),
    (
        "obs-no-data-header",
        "observatory",
        CHECK,
        [edit_glob("wzx*", lambda d: d.replace(b"DATE       TIME", b"XXXX       TIME"))],
        ["wzx", "line 17"],
    ),
    (
        "obs-header-bar",
        "observatory",
        CHECK,
        [edit_glob("wzx*", lambda d: d.replace(b"|", b" ", 1))],
        ["wzx", "line 1", "'|'"],
    ),
    ("obs-empty", "observatory", CHECK, [edit_glob("xjw*", lambda d: b"")], ["xjw", "empty"]),
    (
        "obs-repeat-element",
        "observatory",
        CHECK,
        [edit_glob("xjw*", lambda d: d.replace(b"XJWY", b"XJWX", 1))],
        ["xjw", "line 16", "repeat"],
    ),
    (
        "obs-all-missing",
        "observatory",
        CHECK,
        [iaga_values("*", b"  99999.00")],
        ["every", "value is missing"],
    ),
    (
        "obs-few-records",
        "observatory",
        CHECK,
        [
            cfg("input.files", ["raw/jqz*.min"]),
            edit_glob("jqz*", lambda d: b"".join(d.splitlines(True)[:18])),
        ],
        ["too few readings to process: 2"],
    ),
    (
        "obs-files-nomatch",
        "observatory",
        CHECK,
        [cfg("input.files", ["raw/*.iaga"])],
        ["input.files", "raw/*.iaga"],
    ),
    (
        "obs-drift-bases",
        "observatory",
        CHECK,
        [cfg("drift.bases", [{"station": "A", "gravity": 979000.0}])],
        ["drift.bases"],
    ),
    (
        "obs-internal-degree",
        "observatory",
        CHECK,
        [cfg("separate.internal_degree", 11)],
        ["separate.internal_degree"],
    ),
    (
        "obs-external-degree",
        "observatory",
        CHECK,
        [cfg("separate.external_degree", -1)],
        ["separate.external_degree"],
    ),
    ("obs-damping-neg", "observatory", CHECK, [cfg("separate.damping", -1.0)], ["separate.damping"]),
    ("obs-output-crs", "observatory", CHECK, [cfg("survey.output_crs", "EPSG:4326")], ["survey.output_crs"]),
    (
        "obs-geoid-nan",
        "observatory",
        CHECK,
        [cfg("survey.geoid_undulation", float("nan"))],
        ["survey.geoid_undulation"],
    ),
    (
        "obs-spec-override",
        "observatory",
        CHECK,
        [cfg("survey.spec_overrides", {"separation_rms": 1.0})],
        ["survey.spec_overrides.separation_rms", "did you mean"],
    ),
]


def test_corpus_is_large_and_covers_every_kind():
    assert len(CASES) >= 100
    assert len({case[0] for case in CASES}) == len(CASES)
    assert {case[1] for case in CASES} == set(BUILDERS)


@pytest.mark.parametrize("kind", sorted(BUILDERS))
def test_base_folders_are_valid(bases, kind, tmp_path, capsys):
    root = tmp_path / "survey"
    shutil.copytree(bases[kind], root)
    assert main(["check", str(root)]) == 0
    assert main(["run", str(root), "--until", VALID_STAGE[kind]]) == 0, capsys.readouterr().err


@pytest.mark.parametrize("case_id, kind, command, mutations, expected", CASES, ids=[c[0] for c in CASES])
def test_bad_input(bases, tmp_path, capsys, case_id, kind, command, mutations, expected):
    root = tmp_path / "survey"
    shutil.copytree(bases[kind], root)
    for mutate in mutations:
        mutate(root)
    raw_before = {p: p.read_bytes() for p in (root / "raw").rglob("*") if p.is_file()}
    capsys.readouterr()
    code = main([command[0], str(root), *command[1:]])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1, err
    for text in expected:
        assert text in lines[0], lines[0]
    assert not (root / "out" / ".lock").is_file() or (root / "out").is_file()  # lock released
    assert {p: p.read_bytes() for p in (root / "raw").rglob("*") if p.is_file()} == raw_before
