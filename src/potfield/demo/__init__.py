"""Demo surveys with known truth: airborne magnetic, ground gravity and an observatory network.

All data made here are invented, for a fictional area ("Marrowvale Downs") and fictional
observatories. Each scenario writes a complete survey folder -- ``survey.toml``, ``raw/`` (the
inputs the pipeline reads) and ``truth/`` (every true component, the scenario parameters and
true grids, never read by the pipeline) -- so a processing run can be checked term by term.
The same seed gives the same bytes, NetCDF files included.
"""

from __future__ import annotations

import time
from pathlib import Path

from ..errors import ConfigError

#: Scenario kinds and a one-line summary of each.
KINDS = {
    "magnetic": "airborne magnetic lines and ties with base station and observatory",
    "gravity": "ground gravity loops tied to two bases, counter readings, DEM",
    "observatory": "network of fictional observatories, IAGA-2002 minute data",
}


def make_demo(kind: str, directory: Path, readings: int | None = None, seed: int = 0) -> Path:
    """Write a demo survey folder with known truth.

    Parameters
    ----------
    kind : {"magnetic", "gravity", "observatory"}
        Scenario (see :data:`KINDS`).
    directory : Path
        Folder to write (created; files of an earlier demo in it are overwritten).
    readings : int, optional
        Magnetic scenario only: approximate number of readings, 1,000 to 10,000,000
        (default 30,000). Ignored by the other kinds.
    seed : int
        Seed of ``numpy.random.default_rng``; the same seed gives the same files.

    Returns
    -------
    Path
        The survey folder.

    Raises
    ------
    ConfigError
        Unknown kind, a number of readings out of range, or a folder that holds a survey that
        is not a demo (its raw/ files are never overwritten).

    Notes
    -----
    Writing over an earlier demo folder replaces it: files of raw/ and truth/ that the new
    demo does not write (e.g. observatory days of a larger run) are removed, so a glob in
    survey.toml never picks up stale inputs.
    """
    directory = Path(directory)
    if kind not in KINDS:
        raise ConfigError(f"unknown demo kind '{kind}'", fix=f"use one of: {', '.join(KINDS)}")
    before = _demo_files(directory)
    if before and not (directory / "truth" / "parameters.json").is_file():
        raise ConfigError(
            f"{directory}: the folder already holds files in raw/ or truth/ that are not a demo's",
            fix="write the demo to a new or empty folder",
        )
    started = time.time_ns()
    if kind == "magnetic":
        from .magnetic import make_magnetic

        make_magnetic(directory, readings=readings, seed=seed)
    elif kind == "gravity":
        from .gravity import make_gravity

        make_gravity(directory, seed=seed)
    else:
        from .observatory import make_observatory

        make_observatory(directory, seed=seed)
    for path in before:  # files of the earlier demo that this one did not rewrite
        if path.is_file() and path.stat().st_mtime_ns < started:
            path.unlink()
    return directory


def _demo_files(directory: Path) -> set[Path]:
    """Files under raw/ and truth/ of a folder (empty for a new folder)."""
    files = set()
    for sub in ("raw", "truth"):
        if (directory / sub).is_dir():
            files |= {p for p in (directory / sub).rglob("*") if p.is_file()}
    return files


__all__ = ["KINDS", "make_demo"]
