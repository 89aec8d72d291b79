"""Shared helpers of the demo scenarios: the invented area, smooth random signals, terrain,
deterministic file writing.

All data made here are invented. The area, "Marrowvale Downs", is fictional: its coordinates
(about 32.4 deg S, 145.6 deg E, mid magnetic latitude) only place it on the globe so that the
geomagnetic reference field, normal gravity and the Earth tide take realistic values.

Determinism: every generator draws from ``numpy.random.default_rng(seed)`` only, floats are
rounded to a fixed number of decimals before they are written (pandas then writes the shortest
repr of the rounded double, which is the same on every run), times are formatted by numpy, JSON
is written with sorted keys, lines end in ``"\\n"``, and no file holds the time of its making
(NetCDF included: :func:`potfield.io.grids.write_netcdf` writes no wall-clock stamp, so the
same seed gives the same bytes; :func:`same_netcdf` compares by content all the same).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj

from ..io.atomic import write_csv, write_json, write_text

#: Fictional name of the demo area.
AREA_NAME = "Marrowvale Downs"
#: Centre of the invented area (deg).
CENTRE_LON = 145.62
CENTRE_LAT = -32.43
#: Output CRS of the demo surveys: WGS 84 / UTM zone 55S (the zone of the centre).
OUTPUT_CRS = "EPSG:32755"

DISCLAIMER = (
    f"All data here are invented: synthetic readings made by potfield.demo for the fictional "
    f"area '{AREA_NAME}'. No real survey, place or observatory is represented."
)

#: Magnetic constant (T m / A), for induced magnetisation M = chi F / mu0.
MU0 = 4.0e-7 * np.pi


def rng_for(seed: int, stream: str) -> np.random.Generator:
    """An independent generator per named stream, so adding draws to one stream never changes
    another's numbers: ``numpy.random.default_rng([seed, key])`` with ``key`` the first 8 bytes
    of the SHA-256 of the stream name (the same in every process, unlike ``hash``)."""
    key = int.from_bytes(hashlib.sha256(stream.encode("utf-8")).digest()[:8], "little")
    return np.random.default_rng([int(seed), key])


def transformers():
    """(forward, inverse) pyproj transformers between WGS 84 lon/lat and :data:`OUTPUT_CRS`."""
    fwd = pyproj.Transformer.from_crs("EPSG:4326", OUTPUT_CRS, always_xy=True)
    inv = pyproj.Transformer.from_crs(OUTPUT_CRS, "EPSG:4326", always_xy=True)
    return fwd, inv


def centre_projected() -> tuple[float, float]:
    """Easting and northing (m) of the area centre in :data:`OUTPUT_CRS`."""
    fwd, _ = transformers()
    e, n = fwd.transform(CENTRE_LON, CENTRE_LAT)
    return float(e), float(n)


# --- smooth random signals --------------------------------------------------------------------


def fourier_wander(
    rng: np.random.Generator,
    segment: np.ndarray,
    position: np.ndarray,
    n_segments: int,
    amplitude: float,
    wavelengths: tuple[float, ...],
) -> np.ndarray:
    """A smooth random signal along many segments at once (vectorised over readings).

    Each segment gets a random-phase sum of sinusoids of the given wavelengths (in the units of
    ``position``) with normally distributed amplitudes scaled so the signal's root-mean-square is
    about ``amplitude``: the spectral-representation method of simulating a random process
    (Shinozuka and Deodatis 1991, Appl. Mech. Rev. 44(4):191-204).

    Parameters
    ----------
    rng : numpy.random.Generator
    segment : int array
        Segment index (0..n_segments-1) of each sample.
    position : float array
        Position of each sample along its segment (m or s).
    n_segments : int
    amplitude : float
        Root-mean-square size of the signal.
    wavelengths : tuple of float

    Returns
    -------
    numpy.ndarray
    """
    k = len(wavelengths)
    amps = rng.standard_normal((n_segments, k)) * amplitude / np.sqrt(k / 2.0)
    phases = rng.uniform(0.0, 2.0 * np.pi, (n_segments, k))
    out = np.zeros(position.shape, dtype=float)
    for j, lam in enumerate(wavelengths):  # loop over a handful of wavelengths, not readings
        out += amps[segment, j] * np.sin(2.0 * np.pi * position / lam + phases[segment, j])
    return out


# --- terrain ----------------------------------------------------------------------------------


def make_terrain(
    rng: np.random.Generator,
    half_width: float,
    *,
    base: float,
    relief: float,
    n_hills: int = 9,
    n_valleys: int = 3,
) -> dict:
    """Parameters of an analytic synthetic terrain: a base level, Gaussian hills and valleys and
    a gentle regional slope (a sum of Gaussian bumps: common practice for synthetic topography
    in potential-field tests; no single source). Evaluate with :func:`terrain_height`.

    Parameters
    ----------
    rng : numpy.random.Generator
    half_width : float
        Half the side (m) of the square the features are scattered over (local coordinates
        centred on the area centre).
    base : float
        Base height (m above the ellipsoid).
    relief : float
        Typical hill height (m).
    """
    n = n_hills + n_valleys
    centres = rng.uniform(-half_width, half_width, (n, 2))
    widths = rng.uniform(0.05, 0.18, n) * 2 * half_width
    heights = np.concatenate(
        [rng.uniform(0.4, 1.0, n_hills) * relief, -rng.uniform(0.2, 0.45, n_valleys) * relief]
    )
    slope = rng.uniform(-1.0, 1.0, 2) * relief / (4 * half_width)
    return {
        "base_m": float(base),
        "slope_east": float(slope[0]),
        "slope_north": float(slope[1]),
        "features": [
            {"east": float(c[0]), "north": float(c[1]), "width": float(w), "height": float(h)}
            for c, w, h in zip(centres, widths, heights)
        ],
    }


def terrain_height(east_local, north_local, terrain: dict) -> np.ndarray:
    """Height (m above the ellipsoid) of the analytic terrain of :func:`make_terrain` at local
    coordinates (m from the area centre)."""
    e = np.asarray(east_local, dtype=float)
    n = np.asarray(north_local, dtype=float)
    h = terrain["base_m"] + terrain["slope_east"] * e + terrain["slope_north"] * n
    for f in terrain["features"]:  # a dozen features, each vectorised over all points
        h = h + f["height"] * np.exp(
            -((e - f["east"]) ** 2 + (n - f["north"]) ** 2) / (2.0 * f["width"] ** 2)
        )
    return h


# --- deterministic files ----------------------------------------------------------------------


def iso_times(times: np.ndarray, unit: str = "ms") -> np.ndarray:
    """ISO 8601 UTC strings ending in ``Z`` (numpy formatting: deterministic)."""
    text = np.datetime_as_string(np.asarray(times, dtype="datetime64[ns]"), unit=unit)
    return np.char.add(text, "Z")


def rounded(frame: pd.DataFrame, decimals: dict[str, int]) -> pd.DataFrame:
    """A copy with the named float columns rounded to fixed decimals (so the written text is the
    same on every run)."""
    frame = frame.copy()
    for name, places in decimals.items():
        frame[name] = np.round(frame[name].to_numpy(dtype=float), places)
    return frame


def write_table(path: Path, frame: pd.DataFrame, decimals: dict[str, int] | None = None) -> Path:
    """Write a CSV deterministically (fixed rounding, "\\n" line ends) through
    :func:`potfield.io.atomic.write_csv`."""
    if decimals:
        frame = rounded(frame, decimals)
    return write_csv(path, frame, float_format=None, lineterminator="\n")


def _round_floats(value, digits: int = 9):
    """Round every float to ``digits`` significant digits, so last-bit differences of parallel
    numerical kernels never change the file."""
    if isinstance(value, dict):
        return {k: _round_floats(v, digits) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_round_floats(v, digits) for v in value]
    if isinstance(value, (float, np.floating)):
        return float(f"{float(value):.{digits}g}")
    if isinstance(value, np.ndarray):
        return _round_floats(value.tolist(), digits)
    return value


def write_params(path: Path, params: dict) -> Path:
    """Scenario parameters as JSON with sorted keys and floats rounded to 9 significant digits."""
    return write_json(path, _round_floats(params))


def survey_folders(directory) -> tuple[Path, Path, Path]:
    """Create a demo survey folder and its ``raw/`` and ``truth/`` subfolders.

    Parameters
    ----------
    directory : str or Path
        Survey folder (created with its parents if missing).

    Returns
    -------
    tuple of Path
        ``(directory, raw, truth)``.
    """
    directory = Path(directory)
    raw, truth = directory / "raw", directory / "truth"
    raw.mkdir(parents=True, exist_ok=True)
    truth.mkdir(parents=True, exist_ok=True)
    return directory, raw, truth


def survey_tables(title: str, kind: str, survey_file: str) -> str:
    """The ``[survey]`` and ``[input]`` tables of a demo survey.toml in the invented area.

    Parameters
    ----------
    title : str
        What the demo is, in the survey name (e.g. ``"ground gravity"``).
    kind : str
        Survey kind (``"magnetic"`` or ``"gravity"``).
    survey_file : str
        Name of the comma-delimited readings file under ``raw/``.

    Returns
    -------
    str
        TOML text (no final newline).
    """
    return "\n".join(
        [
            "[survey]",
            f'name = "{AREA_NAME} {title} demo (invented data)"',
            f'kind = "{kind}"',
            'crs = "EPSG:4326"',
            f'output_crs = "{OUTPUT_CRS}"',
            'height_reference = "ellipsoid"',
            "",
            "[input]",
            f'files = ["raw/{survey_file}"]',
            'delimiter = ","',
        ]
    )


def write_readme(path: Path, text: str) -> Path:
    return write_text(path, text.strip() + "\n")


def same_netcdf(path_a: Path, path_b: Path) -> bool:
    """True when two NetCDF files hold the same variables, coordinates, values and attributes,
    the ``history`` stamp apart."""
    import xarray as xr

    with xr.open_dataset(path_a, engine="h5netcdf") as a, xr.open_dataset(path_b, engine="h5netcdf") as b:
        a = a.load()
        b = b.load()
    for ds in (a, b):
        ds.attrs.pop("history", None)
    return bool(a.identical(b))
