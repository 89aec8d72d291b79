"""Stages: glue between survey.toml, the readings table and the physics in potfield.fields.

Each module defines ``STAGE`` (a :class:`potfield.stages.base.Stage`). The order per survey kind
lives in :mod:`potfield.pipeline`.
"""
