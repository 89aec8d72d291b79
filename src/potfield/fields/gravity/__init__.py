"""Gravity reductions: normal gravity, free-air, atmospheric, Bouguer and terrain corrections, Earth tides and the gravimeter network adjustment.

Public API (imported lazily on first use, so importing the package costs nothing):

- ``network``: ``FREE_AIR_GRADIENT``, ``CalibrationRangeError``, ``CalibrationTableError``, ``NetworkError``, ``LoopDriftResult``, ``NetworkResult``, ``calibration_arrays``, ``apply_calibration``, ``instrument_height_correction``, ``hours_since``, ``loop_drift``, ``network_adjustment``, ``detect_steps``
- ``reductions``: ``ReferenceEllipsoid``, ``get_ellipsoid``, ``normal_gravity``, ``free_air_correction``, ``atmospheric_correction``, ``bouguer_slab``, ``bouguer_cap``
- ``terrain``: ``TerrainResult``, ``terrain_correction``
- ``tides``: ``longman_components``, ``longman_gravity``, ``longman_correction``
"""

from __future__ import annotations

import importlib
from typing import Any

#: public name -> the submodule that defines it
_API = {
    "FREE_AIR_GRADIENT": "network",
    "CalibrationRangeError": "network",
    "CalibrationTableError": "network",
    "NetworkError": "network",
    "LoopDriftResult": "network",
    "NetworkResult": "network",
    "calibration_arrays": "network",
    "apply_calibration": "network",
    "instrument_height_correction": "network",
    "hours_since": "network",
    "loop_drift": "network",
    "network_adjustment": "network",
    "detect_steps": "network",
    "ReferenceEllipsoid": "reductions",
    "get_ellipsoid": "reductions",
    "normal_gravity": "reductions",
    "free_air_correction": "reductions",
    "atmospheric_correction": "reductions",
    "bouguer_slab": "reductions",
    "bouguer_cap": "reductions",
    "TerrainResult": "terrain",
    "terrain_correction": "terrain",
    "longman_components": "tides",
    "longman_gravity": "tides",
    "longman_correction": "tides",
}
_MODULES = ("network", "reductions", "terrain", "tides")

__all__ = [*_MODULES, *_API]


def __getattr__(name: str) -> Any:
    if name in _MODULES:
        return importlib.import_module(f"{__name__}.{name}")
    if name in _API:
        return getattr(importlib.import_module(f"{__name__}.{_API[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
