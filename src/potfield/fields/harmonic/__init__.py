"""Harmonic-field methods: equivalent sources, FFT continuation and derivatives, regional/residual and internal/external separation, spherical harmonics and tiled gridding.

Public API (imported lazily on first use, so importing the package costs nothing):

- ``eqsources``: ``EquivalentSourceModel``, ``fit_equivalent_sources``, ``cross_validate``, ``save_model``, ``load_model``, ``median_spacing``, ``DENSE_LIMIT``
- ``separation``: ``regional_upward``, ``TwoLayerSources``, ``fit_two_layer``, ``two_layer_dampings``, ``separate_vector_plane``, ``separate_two_heights``, ``GaussFit``, ``fit_gauss_coefficients``, ``coefficient_table``, ``induction_ratio``, ``external_field_at``, ``nearest_station``, ``remote_reference_caution``
- ``spherical``: ``coefficient_index``, ``coefficient_names``, ``n_coefficients``, ``degree_of``, ``schmidt_legendre``, ``design_matrices``, ``geodetic_design_matrices``, ``synthesis``, ``geodetic_synthesis``, ``REFERENCE_RADIUS_M``
- ``tiles``: ``TiledGrid``, ``cosine_step``, ``tile_boundaries``, ``tile_windows``, ``axis_weights``, ``tile_axis_weight``, ``blend_weights``, ``fit_tiled``, ``grid_tiled``
- ``transforms``: ``PaddedGrid``, ``fill_masked``, ``pad_grid``, ``upward_continuation``, ``downward_continuation``, ``model_upward_continuation``, ``vertical_derivative``, ``horizontal_derivatives``, ``total_horizontal_gradient``, ``total_gradient_amplitude``, ``tilt_angle``, ``grid_declination``, ``rtp_method_for``, ``default_pseudo_inclination``, ``reduction_to_pole``
"""

from __future__ import annotations

import importlib
from typing import Any

#: public name -> the submodule that defines it
_API = {
    "EquivalentSourceModel": "eqsources",
    "fit_equivalent_sources": "eqsources",
    "cross_validate": "eqsources",
    "save_model": "eqsources",
    "load_model": "eqsources",
    "median_spacing": "eqsources",
    "DENSE_LIMIT": "eqsources",
    "regional_upward": "separation",
    "TwoLayerSources": "separation",
    "fit_two_layer": "separation",
    "two_layer_dampings": "separation",
    "separate_vector_plane": "separation",
    "separate_two_heights": "separation",
    "GaussFit": "separation",
    "fit_gauss_coefficients": "separation",
    "coefficient_table": "separation",
    "induction_ratio": "separation",
    "external_field_at": "separation",
    "nearest_station": "separation",
    "remote_reference_caution": "separation",
    "coefficient_index": "spherical",
    "coefficient_names": "spherical",
    "n_coefficients": "spherical",
    "degree_of": "spherical",
    "schmidt_legendre": "spherical",
    "design_matrices": "spherical",
    "geodetic_design_matrices": "spherical",
    "synthesis": "spherical",
    "geodetic_synthesis": "spherical",
    "REFERENCE_RADIUS_M": "spherical",
    "TiledGrid": "tiles",
    "cosine_step": "tiles",
    "tile_boundaries": "tiles",
    "tile_windows": "tiles",
    "axis_weights": "tiles",
    "tile_axis_weight": "tiles",
    "blend_weights": "tiles",
    "fit_tiled": "tiles",
    "grid_tiled": "tiles",
    "PaddedGrid": "transforms",
    "fill_masked": "transforms",
    "pad_grid": "transforms",
    "upward_continuation": "transforms",
    "downward_continuation": "transforms",
    "model_upward_continuation": "transforms",
    "vertical_derivative": "transforms",
    "horizontal_derivatives": "transforms",
    "total_horizontal_gradient": "transforms",
    "total_gradient_amplitude": "transforms",
    "tilt_angle": "transforms",
    "grid_declination": "transforms",
    "rtp_method_for": "transforms",
    "default_pseudo_inclination": "transforms",
    "reduction_to_pole": "transforms",
}
_MODULES = ("eqsources", "separation", "spherical", "tiles", "transforms")

__all__ = [*_MODULES, *_API]


def __getattr__(name: str) -> Any:
    if name in _MODULES:
        return importlib.import_module(f"{__name__}.{name}")
    if name in _API:
        return getattr(importlib.import_module(f"{__name__}.{_API[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
