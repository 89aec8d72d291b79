"""Physics on numpy arrays and xarray grids, by subject.

- ``potfield.fields.magnetic``: IGRF synthesis, diurnal corrections
- ``potfield.fields.gravity``: normal gravity and reductions, terrain, tides, network adjustment
- ``potfield.fields.harmonic``: equivalent sources, transforms, separation, spherical harmonics, tiles
- ``potfield.fields.lines``: levelling and along-line noise

These functions know nothing of configuration files: they raise the ``ValueError`` subclasses
of ``potfield.fields.errors`` in physics words, and the stages translate them into the tool's
errors naming the configuration key (``potfield.stages._boundary.translate``). Shared numerics
(damped least squares, block median, data spacing, bilinear sampling) live once in
``potfield.fields._numerics``.
"""
