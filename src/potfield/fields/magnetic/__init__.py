"""Magnetic reference and time-varying fields: IGRF synthesis and diurnal (base-station) corrections.

Public API (imported lazily on first use, so importing the package costs nothing):

- ``diurnal``: ``time_epoch``, ``to_seconds``, ``BaseCleaning``, ``running_median``, ``clean_base``, ``BaseSessions``, ``base_sessions``, ``setup_transients``, ``session_datums``, ``find_gaps``, ``interpolate_base``, ``base_datum``, ``diurnal_correction``, ``great_circle_distance``, ``combine_bases``, ``station_difference``, ``ChordDeviation``, ``chord_deviation``, ``highpass``, ``TimeOffset``, ``estimate_time_offset``
- ``igrf``: ``IGRFField``, ``GeocentricField``, ``igrf``, ``igrf_geocentric``, ``coefficients``, ``decimal_year``, ``geodetic_to_geocentric``, ``REFERENCE_RADIUS_M``, ``FIRST_YEAR``, ``LAST_YEAR``, ``MODEL_NAME``
"""

from __future__ import annotations

import importlib
from typing import Any

#: public name -> the submodule that defines it
_API = {
    "time_epoch": "diurnal",
    "to_seconds": "diurnal",
    "BaseCleaning": "diurnal",
    "running_median": "diurnal",
    "clean_base": "diurnal",
    "BaseSessions": "diurnal",
    "base_sessions": "diurnal",
    "setup_transients": "diurnal",
    "session_datums": "diurnal",
    "find_gaps": "diurnal",
    "interpolate_base": "diurnal",
    "base_datum": "diurnal",
    "diurnal_correction": "diurnal",
    "great_circle_distance": "diurnal",
    "combine_bases": "diurnal",
    "station_difference": "diurnal",
    "ChordDeviation": "diurnal",
    "chord_deviation": "diurnal",
    "highpass": "diurnal",
    "TimeOffset": "diurnal",
    "estimate_time_offset": "diurnal",
    "IGRFField": "igrf",
    "GeocentricField": "igrf",
    "igrf": "igrf",
    "igrf_geocentric": "igrf",
    "coefficients": "igrf",
    "decimal_year": "igrf",
    "geodetic_to_geocentric": "igrf",
    "REFERENCE_RADIUS_M": "igrf",
    "FIRST_YEAR": "igrf",
    "LAST_YEAR": "igrf",
    "MODEL_NAME": "igrf",
}
_MODULES = ("diurnal", "igrf")

__all__ = [*_MODULES, *_API]


def __getattr__(name: str) -> Any:
    if name in _MODULES:
        return importlib.import_module(f"{__name__}.{name}")
    if name in _API:
        return getattr(importlib.import_module(f"{__name__}.{_API[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
