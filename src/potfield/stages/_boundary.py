"""The error boundary between the physics (potfield.fields) and the tool.

Field functions raise :class:`potfield.fields.errors.FieldError` subclasses (ValueError) in
physics words; a stage calls them inside :func:`translate`, which re-raises them as the tool's
errors (:mod:`potfield.errors`) with the configuration key or file and the fix, so the command
line prints one line and exits 2::

    with translate(ConfigError, key="separate.regional_height_m", fix="give metres > 0"):
        regional, residual = sep.regional_upward(grid, cfg.regional_height_m)

Different field errors of one call can map to different tool errors, keys or fixes::

    with translate({BadParameter: Rule(ConfigError, key="separate.damping"),
                    IllPosed: Rule(InputDataError, fix="add stations")}):
        ...

Only FieldError subclasses are caught, never a bare ValueError (a bug stays a traceback).
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import NamedTuple

from ..errors import PotfieldError
from ..fields.errors import FieldError

__all__ = ["Rule", "translate"]


class Rule(NamedTuple):
    """How one kind of field error becomes a tool error."""

    tool: type[PotfieldError]
    key: str | None = None
    file: object = None
    fix: str | None = None


@contextmanager
def translate(
    to: type[PotfieldError] | Mapping[type[FieldError], Rule | type[PotfieldError]],
    *,
    key: str | None = None,
    file: object = None,
    fix: str | None = None,
) -> Iterator[None]:
    """Re-raise field errors raised inside the block as tool errors.

    Parameters
    ----------
    to : PotfieldError subclass, or mapping
        The tool error for every field error, or ``{FieldError subclass: Rule or tool class}``
        (first matching entry wins; field errors matching none propagate unchanged).
    key, file, fix : optional
        Configuration key, file and fix of the message (defaults of the mapping's entries). The
        fix defaults to the field error's hint.
    """
    try:
        yield
    except FieldError as err:
        rules = to.items() if isinstance(to, Mapping) else [(FieldError, to)]
        for kind, rule in rules:
            if isinstance(err, kind):
                if not isinstance(rule, Rule):
                    rule = Rule(rule)
                raise rule.tool(
                    err.message, key=rule.key or key, file=rule.file or file, fix=rule.fix or fix or err.hint
                ) from None
        raise
