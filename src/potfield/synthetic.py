"""A small generator of synthetic line data (for tests of the frame and the ingest benchmark).

Not a scenario with physical truth (that is potfield.demo): straight north-south traverse lines
and east-west tie lines with a smooth field, noise, a few spikes and a time gap, written as CSV
in the column names of the magnetic template (configs/magnetic.toml).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .io.atomic import atomic_path


def synthetic_lines(
    readings: int = 20_000,
    lines: int = 10,
    ties: int = 2,
    seed: int = 0,
    lon0: float = 138.0,
    lat0: float = -33.0,
    spacing_m: float = 200.0,
    rate_hz: float = 10.0,
    speed_ms: float = 60.0,
) -> pd.DataFrame:
    """Lines of readings with the template's column names (line, time_utc, longitude, latitude, height_m, total_field_nT):
    the IGRF-14 main field plus a smooth anomaly, a slow drift, noise and spikes."""
    rng = np.random.default_rng(seed)
    total_lines = lines + ties
    per_line = max(readings // total_lines, 5)
    step = speed_ms / rate_hz
    length = per_line * step
    i = np.arange(per_line)
    frames = []
    t0 = np.datetime64("2024-05-01T01:00:00", "ns")
    clock = 0.0
    m_per_deg_lat = 111_132.0
    m_per_deg_lon = 111_320.0 * np.cos(np.radians(lat0))
    for k in range(total_lines):
        tie = k >= lines
        along = i * step if k % 2 == 0 else (length - i * step)
        if not tie:
            x = np.full(per_line, k * spacing_m) + rng.normal(0, 2, per_line).cumsum() * 0.01
            y = along
            name = str(1000 + 10 * k)
        else:
            j = k - lines
            y = np.full(per_line, (j + 0.5) * length / ties)
            x = along * (lines * spacing_m) / length
            name = str(9000 + 10 * j)
        seconds = clock + i / rate_hz
        clock = seconds[-1] + 120.0
        field = 50_000.0 + 30 * np.sin(x / 700.0) * np.cos(y / 900.0) + 0.02 * seconds / 60
        field = field + rng.normal(0, 0.02, per_line)
        frames.append(
            pd.DataFrame(
                {
                    "line": name,
                    "time_utc": (t0 + (seconds * 1e9).astype("int64").astype("timedelta64[ns]")),
                    "longitude": lon0 + x / m_per_deg_lon,
                    "latitude": lat0 + y / m_per_deg_lat,
                    "height_m": 120.0 + rng.normal(0, 1, per_line),
                    "total_field_nT": field,
                }
            )
        )
    table = pd.concat(frames, ignore_index=True)
    from .fields.magnetic.igrf import igrf

    main = igrf(
        table["longitude"].to_numpy(),
        table["latitude"].to_numpy(),
        table["height_m"].to_numpy(),
        table["time_utc"].to_numpy(),
    ).total
    table["total_field_nT"] = table["total_field_nT"].to_numpy() - 50_000.0 + main
    spikes = rng.choice(len(table), size=max(len(table) // 5000, 1), replace=False)
    table.loc[spikes, "total_field_nT"] += rng.choice([-1, 1], spikes.size) * 25.0
    # a time gap of 5 s inside the first line
    if per_line > 200:
        table = table.drop(index=range(100, 150)).reset_index(drop=True)
    return table


def write_synthetic_survey(directory: Path, readings: int = 20_000, seed: int = 0, **kwargs) -> Path:
    """Write raw/lines.csv for a survey folder made with ``potfield new DIR --kind magnetic``."""
    directory = Path(directory)
    (directory / "raw").mkdir(parents=True, exist_ok=True)
    table = synthetic_lines(readings, seed=seed, **kwargs)
    table["time_utc"] = pd.to_datetime(table["time_utc"]).dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    path = directory / "raw" / "lines.csv"
    with atomic_path(path) as tmp:
        table.to_csv(tmp, index=False, float_format="%.9f", lineterminator="\n")
    return path
