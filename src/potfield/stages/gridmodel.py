"""What later stages read back from the grid stage: its equivalent-source model and grid height.

Shared by the derive and separate stages, which both predict the grid stage's equivalent-source
model on (or above) the main grid's surface when there is one.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .base import StageContext, StageOutput

__all__ = ["grid_height", "load_grid_model"]


def grid_height(ctx: StageContext, grid):
    """Height (m) of a grid's surface.

    Looked up in order: an ``upward`` coordinate of the grid, the grid stage's record
    ``height``, the grid's ``height`` attribute, a numeric
    ``[grid] height``.

    Parameters
    ----------
    ctx : StageContext
        Stage context (``ctx.state["grid"]`` and ``ctx.config.grid.height`` are read).
    grid : xarray.DataArray
        The grid, with ``northing`` and ``easting`` dimensions.

    Returns
    -------
    numpy.ndarray or float or None
        The ``upward`` coordinate as a float array (northing before easting), else a constant
        height, else None when the height is unknown.
    """
    if "upward" in grid.coords:
        upward = grid["upward"]
        dims = [d for d in ("northing", "easting") if d in upward.dims]
        return np.asarray(upward.transpose(*dims).values, dtype=float)
    value = ctx.state.get("grid", {}).get("height")
    if isinstance(value, (int, float)) and math.isfinite(value):
        return float(value)
    for value in (grid.attrs.get("height"), ctx.config.grid.height):
        if isinstance(value, (int, float, np.floating)) and math.isfinite(float(value)):
            return float(value)
    return None


def load_grid_model(ctx: StageContext, out: StageOutput, *, missing: str, absent: str | None = None):
    """The grid stage's equivalent-source model (``ctx.state["grid"]["model_path"]``), or None.

    Parameters
    ----------
    ctx : StageContext
        Stage context; a relative model path is resolved in the survey folder.
    out : StageOutput
        Receives a warning when the recorded model file is missing, and the ``absent`` note
        when the grid stage recorded no model.
    missing : str
        What the stage does instead when the model file is missing; the warning reads
        ``"equivalent-source model PATH is missing: " + missing``.
    absent : str, optional
        Note added when the grid stage recorded no model; default no note.

    Returns
    -------
    potfield.fields.harmonic.eqsources.EquivalentSourceModel or None
    """
    path = ctx.state.get("grid", {}).get("model_path")
    if not path:
        if absent is not None:
            out.notes.append(absent)
        return None
    path = Path(path)
    if not path.is_absolute():
        path = ctx.survey.resolve(str(path))
    if not path.is_file():
        out.warnings.append(f"equivalent-source model {path} is missing: {missing}")
        return None
    from ..fields.harmonic.eqsources import load_model

    return load_model(path)
