"""Property tests: arbitrary bytes, text and TOML mutations reach the user as PotfieldErrors only.

The readers (delimited text, IAGA-2002) and the survey.toml loader are called directly on small
inputs: whatever the input, they either return or raise a :class:`potfield.errors.PotfieldError`
subclass, never another exception (the command line turns only those into one-line messages).
Each start from a valid invented input and mutates it (splice bytes, replace values), so most
examples are near-valid and reach deep into the parsers. Examples are derandomised so CI is
repeatable.
"""

from __future__ import annotations

import math
import tomllib
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from potfield.config import SurveyConfig, load_config, parse_config
from potfield.errors import PotfieldError
from potfield.io.delimited import parse_time, read_delimited, to_numeric
from potfield.io.iaga2002 import observatory_table, read_iaga2002, write_iaga2002

EXAMPLES = 2000
FUZZ = settings(
    max_examples=EXAMPLES,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

# --- byte mutations --------------------------------------------------------------------------

#: Bytes that matter to the parsers, mixed into random ones.
INTERESTING = [
    b",",
    b";",
    b"\t",
    b" ",
    b"\n",
    b"\r\n",
    b'"',
    b"|",
    b"-",
    b".",
    b"e",
    b"inf",
    b"nan",
    b"9" * 25,
    b"\xff",
    b"\xe9",
    b"\x00",
    b"T",
    b":",
    b"Z",
    b"1e400",
    b"-0",
]

splice = st.tuples(
    st.floats(0, 1), st.integers(0, 12), st.one_of(st.binary(max_size=6), st.sampled_from(INTERESTING))
)


def mutate(data: bytes, edits) -> bytes:
    """Apply (position fraction, bytes to delete, bytes to insert) edits in turn."""
    for where, cut, insert in edits:
        at = int(where * len(data))
        data = data[:at] + insert + data[at + cut :]
    return data


def _case(tmp_path: Path, name: str) -> Path:
    # one file per example (hypothesis reuses the function-scoped tmp_path)
    return tmp_path / name


# --- delimited reader ------------------------------------------------------------------------

CSV_TEXT = (
    b"LINE,UTC,LON,LAT,HEIGHT,TMI\n"
    b"1010,2024-05-01T01:00:00.0Z,138.0001,-33.0001,120.5,57001.25\n"
    b"1010,2024-05-01T01:00:00.1Z,138.0002,-33.0002,120.6,57001.31\n"
    b"1010,2024-05-01T01:00:00.2Z,138.0003,-33.0003,120.4,57001.28\n"
    b"9010,2024-05-01T01:05:00.0Z,138.0001,-33.0010,121.0,57002.01\n"
    b"9010,2024-05-01T01:05:00.1Z,138.0002,-33.0010,121.1,57002.07\n"
)
CSV_COLUMNS = {
    "line": "LINE",
    "time": "UTC",
    "longitude": "LON",
    "latitude": "LAT",
    "height": "HEIGHT",
    "total_field": "TMI",
}
SECONDS_TEXT = (
    b"DATE SOD F\n2024-11-18 79800.0 57078.35\n2024-11-18 79801.0 57078.30\n20241118 79802.5 57078.33\n"
)
SECONDS_COLUMNS = {"date": "DATE", "time": "SOD", "total_field": "F"}


def _read_all(path: Path, columns: dict, time_format: str, delimiter: str, encoding: str) -> None:
    from potfield.config import TimeSection

    frame = read_delimited(
        path, columns=columns, delimiter=delimiter, encoding=encoding, missing_values=["*", "NaN", "-99999"]
    )
    parse_time(frame, TimeSection(format=time_format, date="2024-05-01"), path)
    for name in columns:
        if name not in ("time", "date", "line"):
            values = to_numeric(frame, name, path)
            assert not np.isinf(values).any()  # never hand on an infinite number


@FUZZ
@given(
    edits=st.lists(splice, max_size=4),
    layout=st.sampled_from(["csv", "seconds"]),
    delimiter=st.sampled_from(["auto", ",", ";", "whitespace"]),
    encoding=st.sampled_from(["utf-8", "utf-8", "latin-1", "ascii"]),
    gz=st.booleans(),
)
def test_delimited_reader_raises_only_potfield_errors(
    tmp_path_factory, edits, layout, delimiter, encoding, gz
):
    base, columns, fmt = (
        (CSV_TEXT, CSV_COLUMNS, "iso") if layout == "csv" else (SECONDS_TEXT, SECONDS_COLUMNS, "date_seconds")
    )
    data = mutate(base, edits)
    folder = tmp_path_factory.mktemp("d", numbered=True)
    path = folder / ("in.csv.gz" if gz else "in.csv")
    if gz:
        import gzip

        path.write_bytes(gzip.compress(data, mtime=0))
    else:
        path.write_bytes(data)
    try:
        _read_all(path, columns, fmt, delimiter, encoding)
    except PotfieldError as err:
        event(f"error: {type(err).__name__}")
        assert "\n" not in str(err)


@settings(
    max_examples=400,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)
@given(data=st.binary(max_size=300))
def test_delimited_reader_arbitrary_bytes(tmp_path_factory, data):
    path = tmp_path_factory.mktemp("b", numbered=True) / "in.csv"
    path.write_bytes(data)
    try:
        _read_all(path, CSV_COLUMNS, "iso", "auto", "utf-8")
    except PotfieldError:
        pass


# --- IAGA-2002 reader ------------------------------------------------------------------------


def _iaga_bytes() -> bytes:
    times = pd.date_range("2024-05-01T00:00", periods=5, freq="min")
    frame = pd.DataFrame(
        {
            "time": times,
            "X": 20000.0 + np.arange(5),
            "Y": 1500.0 - np.arange(5),
            "Z": 45000.0 + 0.5 * np.arange(5),
            "F": 49280.0 + np.arange(5),
        }
    )
    header = {
        "source": "Invented",
        "station_name": "Fictional Hill",
        "iaga_code": "FHX",
        "latitude": -35.5,
        "longitude": 148.9,
        "elevation": 600,
        "reported": "XYZF",
        "sensor_orientation": "XYZ",
        "digital_sampling": "1 second",
        "interval_type": "1-minute",
        "data_type": "variation",
    }
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        path = write_iaga2002(Path(tmp) / "fhx.min", frame, header=header)
        return path.read_bytes()


IAGA = _iaga_bytes()


@FUZZ
@given(edits=st.lists(splice, max_size=4))
def test_iaga2002_reader_raises_only_potfield_errors(tmp_path_factory, edits):
    data = mutate(IAGA, edits)
    path = tmp_path_factory.mktemp("i", numbered=True) / "fhx20240501dmin.min"
    path.write_bytes(data)
    try:
        record = read_iaga2002(path)
        table = observatory_table([path])
    except PotfieldError as err:
        event(f"error: {type(err).__name__}")
        assert "\n" not in str(err)
        return
    event("accepted")
    assert len(record.data) == len(table)
    assert np.isfinite(table["latitude"]).all() and np.isfinite(table["longitude"]).all()


# --- survey.toml ------------------------------------------------------------------------------

TEMPLATES = {
    kind: (resources.files("potfield") / "data" / "configs" / f"{kind}.toml").read_bytes()
    for kind in ("magnetic", "gravity", "observatory")
}
PARSED = {kind: tomllib.loads(text.decode()) for kind, text in TEMPLATES.items()}


def _paths(tree, prefix=()):
    for key, value in tree.items():
        yield (*prefix, key)
        if isinstance(value, dict):
            yield from _paths(value, (*prefix, key))


PATHS = sorted(
    {p for tree in PARSED.values() for p in _paths(tree)}
    | {
        ("grid", "cv_folds"),
        ("grid", "dampings"),
        ("clean", "height_min"),
        ("survey", "spec_overrides"),
        ("diurnal", "bases"),
        ("drift", "bases"),
        ("input", "encoding"),
        ("reference", "terrain_inner_radius_m"),
    }
)

scalars = st.one_of(
    st.integers(-(10**20), 10**20),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.booleans(),
    st.just(""),
    st.just("auto"),
)
values = st.recursive(
    scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=8), inner, max_size=3)
    ),
    max_leaves=6,
)


@FUZZ
@given(
    kind=st.sampled_from(sorted(PARSED)),
    changes=st.lists(st.tuples(st.sampled_from(PATHS), values), min_size=1, max_size=3),
)
def test_config_values_raise_only_config_errors(kind, changes):
    import copy

    from potfield.qc.specs import load_spec

    data = copy.deepcopy(PARSED[kind])
    for path, value in changes:
        node = data
        for part in path[:-1]:
            if not isinstance(node.get(part), dict):
                node[part] = {}
            node = node[part]
        node[path[-1]] = value
    try:
        config = parse_config(data)
        load_spec(config)
    except PotfieldError as err:
        event(f"error: {type(err).__name__}")
        assert "\n" not in str(err)
        return
    event("accepted")
    # whatever was accepted is finite
    dumped = config.model_dump()

    def finite(tree):
        if isinstance(tree, float):
            assert math.isfinite(tree)
        elif isinstance(tree, dict):
            for item in tree.values():
                finite(item)
        elif isinstance(tree, list):
            for item in tree:
                finite(item)

    finite(dumped)


@FUZZ
@given(kind=st.sampled_from(sorted(TEMPLATES)), edits=st.lists(splice, min_size=1, max_size=4))
def test_config_bytes_raise_only_config_errors(tmp_path_factory, kind, edits):
    path = tmp_path_factory.mktemp("c", numbered=True) / "survey.toml"
    path.write_bytes(mutate(TEMPLATES[kind], edits))
    try:
        config = load_config(path)
    except PotfieldError as err:
        event(f"error: {type(err).__name__}")
        assert "\n" not in str(err)
        return
    event("accepted")
    assert isinstance(config, SurveyConfig)
