"""Errors of the physics functions, in physics words.

The functions in :mod:`potfield.fields` know nothing of survey folders or configuration files:
they raise these :class:`ValueError` subclasses, with a message about the numbers and, where it
helps, a ``hint`` on what would make the computation possible. The stages translate them into
the tool's errors (:mod:`potfield.errors`), adding the configuration key or file and the fix
(:mod:`potfield.stages._boundary`).
"""

from __future__ import annotations

__all__ = [
    "BadGeometry",
    "BadParameter",
    "FieldError",
    "IllPosed",
    "NotEnoughData",
    "OutOfModelRange",
]


class FieldError(ValueError):
    """Base class: a physics function cannot compute with the values it was given.

    Parameters
    ----------
    message : str
        What is wrong, in physics words.
    hint : str, optional
        What would make the computation possible (appended as ``(hint: ...)``).
    """

    def __init__(self, message: str, *, hint: str | None = None) -> None:
        self.message = " ".join(str(message).split())
        self.hint = hint
        super().__init__(f"{self.message} (hint: {hint})" if hint else self.message)


class BadParameter(FieldError):
    """A parameter is outside its domain (a negative height, an unknown method name...)."""


class BadGeometry(FieldError):
    """Grids or points are not laid out as the method needs (dimensions, spacing, cells,
    positions relative to sources)."""


class NotEnoughData(FieldError):
    """Too few finite data, stations or grid cells for the computation."""


class IllPosed(FieldError):
    """The data cannot determine the unknowns (rank-deficient design, unresolvable network)."""


class OutOfModelRange(FieldError):
    """A model (IGRF, tides, a calibration table...) is asked for outside where it is defined."""
