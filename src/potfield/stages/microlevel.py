"""Micro-levelling of line data at the readings (Minty 1991), shared by the level and grid stages.

Glue only: the filters are in :mod:`potfield.fields.lines.leveling`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..errors import StageError
from ..fields.lines import leveling

__all__ = ["micro_level_table"]


def micro_level_table(table: pd.DataFrame, grid, line_spacing: float, config_level) -> np.ndarray:
    """Per-reading micro-levelling corrections (Minty 1991), for the grid stage.

    Call this with the grid made from the levelled readings when ``[level] micro_levelling`` is
    true; add the returned array to the gridded value column (e.g. ``anomaly_levelled``) and grid
    again. The corrugation of ``grid`` is estimated by :func:`potfield.fields.lines.leveling.micro_level`
    (high-pass across the traverse lines with cut-off ``micro_cutoff_spacings * line_spacing``,
    low-pass along them with cut-off ``micro_along_spacings * line_spacing``, clipped to
    ``+-micro_max_amplitude``), sampled at every reading (bilinear), low-passed along each line
    with the same along-line cut-off, and negated.

    Parameters
    ----------
    table : pandas.DataFrame
        Readings with ``easting``, ``northing``, ``line``, optional ``line_type`` (the line
        direction is the mean direction of the traverse lines) and ``distance`` (else it is
        computed from the coordinates).
    grid : xarray.DataArray
        The gridded levelled values (``northing``, ``easting`` dimensions, regular spacing).
    line_spacing : float
        Nominal traverse line spacing (m), e.g. ``ctx.state["ingest"]["line_spacing_m"]``.
    config_level : potfield.config.LevelSection
        The ``[level]`` section.

    Returns
    -------
    numpy.ndarray, shape (len(table),)
        Correction to ADD to each reading (field units); 0 for readings outside the grid.

    References
    ----------
    Minty, B. R. S. (1991). Simple micro-levelling for aeromagnetic data. Exploration
    Geophysics 22:591-592.
    """
    if not line_spacing or not np.isfinite(line_spacing) or line_spacing <= 0:
        raise StageError(
            f"micro-levelling needs a positive line spacing, got {line_spacing}",
            key="level.micro_levelling",
            fix="set [level] micro_levelling = false for surveys without regular lines",
        )
    east = table["easting"].to_numpy(float)
    north = table["northing"].to_numpy(float)
    lines = table["line"].astype(str).to_numpy()
    trav = (
        (table["line_type"].astype(str).to_numpy() != "tie")
        if "line_type" in table
        else np.ones(len(table), dtype=bool)
    )
    direction = leveling.line_azimuth(east[trav], north[trav], lines[trav])
    along = config_level.micro_along_spacings * line_spacing
    corrugation = leveling.micro_level(
        grid,
        direction,
        line_spacing,
        config_level.micro_cutoff_spacings,
        config_level.micro_max_amplitude,
        along_wavelength=along,
    )
    sampled = leveling.sample_grid(corrugation, east, north)
    if "distance" in table:
        distance = table["distance"].to_numpy(float)
    else:
        step = np.hypot(np.diff(east, prepend=east[:1]), np.diff(north, prepend=north[:1]))
        step[np.r_[True, lines[1:] != lines[:-1]]] = 0.0
        distance = pd.Series(step).groupby(lines).cumsum().to_numpy()
    smooth = leveling.lowpass_along_lines(sampled, lines, distance, along)
    return -np.nan_to_num(smooth, nan=0.0)
