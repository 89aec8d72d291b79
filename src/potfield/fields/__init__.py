"""Physics on numpy arrays and xarray grids, by subject.

- ``potfield.fields.magnetic``: IGRF synthesis, diurnal corrections
- ``potfield.fields.gravity``: normal gravity and reductions, terrain, tides, network adjustment
- ``potfield.fields.harmonic``: equivalent sources, transforms, separation, spherical harmonics, tiles
- ``potfield.fields.lines``: levelling and along-line noise

These functions know nothing of survey.toml: they raise ``ValueError`` (or a subclass) in physics
words, and the stages translate that into the tool's errors naming the configuration key.
"""
