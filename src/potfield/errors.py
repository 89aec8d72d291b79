"""User-facing errors.

Every failure caused by a user's input (configuration, files, values) is raised as a
:class:`PotfieldError` subclass. The command line prints ``str(error)`` as one line and exits
with code 2, never a traceback. Messages name the file, the row or key, and the fix.
"""

from __future__ import annotations


class PotfieldError(Exception):
    """Base class of every user-facing error (exit code 2)."""

    exit_code = 2

    def __init__(self, message: str, *, file=None, row=None, key=None, fix: str | None = None):
        parts = []
        if file is not None:
            parts.append(str(file))
        if row is not None:
            parts.append(f"row {row}")
        if key is not None:
            parts.append(f"key '{key}'")
        where = ", ".join(parts)
        text = f"{where}: {message}" if where else message
        if fix:
            text = f"{text} (fix: {fix})"
        # One line, always.
        text = " ".join(text.split())
        super().__init__(text)


class ConfigError(PotfieldError):
    """survey.toml is missing, unreadable or invalid."""


class InputDataError(PotfieldError):
    """A raw input file is missing, empty or holds values that cannot be used."""


class CRSError(PotfieldError):
    """A coordinate reference system cannot be understood or used."""


class ModelRangeError(PotfieldError):
    """A model (IGRF, tides, ...) is asked for outside the range it is defined on."""


class SurveyLockedError(PotfieldError):
    """Another run holds the survey's lock."""


class OutputError(PotfieldError):
    """out/ (or a file in it) cannot be written: permissions, a full disk, a file in the way."""


class StageError(PotfieldError):
    """A stage cannot run with the inputs it was given (e.g. a required earlier stage missing)."""


def format_rows(rows, limit: int = 5) -> str:
    """Format 1-based row numbers for a message: ``"3, 17, 18 (and 4 more)"``."""
    rows = list(rows)
    text = ", ".join(str(int(r)) for r in rows[:limit])
    if len(rows) > limit:
        text += f" (and {len(rows) - limit} more)"
    return text
