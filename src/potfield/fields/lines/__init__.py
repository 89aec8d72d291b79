"""Along-line methods: tie-line levelling, micro-levelling and along-line noise and spike tests.

Public API (imported lazily on first use, so importing the package costs nothing):

- ``leveling``: ``find_crossovers``, ``usable_crossovers``, ``huber_weights``, ``robust_lstsq``, ``adjust_ties``, ``TieAdjustment``, ``adjust_lines``, ``LineAdjustment``, ``adjust_network``, ``line_azimuth``, ``micro_level``, ``sample_grid``, ``lowpass_along_lines``
- ``noise``: ``fourth_difference``, ``rolling_median``, ``robust_spikes``, ``cap_flags``, ``first_difference_spikes``, ``line_noise``
"""

from __future__ import annotations

import importlib
from typing import Any

#: public name -> the submodule that defines it
_API = {
    "find_crossovers": "leveling",
    "usable_crossovers": "leveling",
    "huber_weights": "leveling",
    "robust_lstsq": "leveling",
    "adjust_ties": "leveling",
    "TieAdjustment": "leveling",
    "adjust_lines": "leveling",
    "LineAdjustment": "leveling",
    "adjust_network": "leveling",
    "line_azimuth": "leveling",
    "micro_level": "leveling",
    "sample_grid": "leveling",
    "lowpass_along_lines": "leveling",
    "fourth_difference": "noise",
    "rolling_median": "noise",
    "robust_spikes": "noise",
    "cap_flags": "noise",
    "first_difference_spikes": "noise",
    "line_noise": "noise",
}
_MODULES = ("leveling", "noise")

__all__ = [*_MODULES, *_API]


def __getattr__(name: str) -> Any:
    if name in _MODULES:
        return importlib.import_module(f"{__name__}.{name}")
    if name in _API:
        return getattr(importlib.import_module(f"{__name__}.{_API[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
