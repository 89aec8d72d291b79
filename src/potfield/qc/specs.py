"""Spec profiles: named tolerances with their source, from configs/specs/*.toml.

A profile is chosen in survey.toml (``[survey] spec = "airborne-magnetic"``; ``"auto"`` picks one
by survey kind) and single values are overridden with ``[survey] spec_overrides``.
"""

from __future__ import annotations

import math
import tomllib
from importlib import resources
from pathlib import Path

from ..errors import ConfigError

DEFAULT_PROFILE = {"magnetic": "airborne-magnetic", "gravity": "ground-gravity", "observatory": "observatory"}


def profiles_dir() -> Path:
    return Path(str(resources.files("potfield") / "data" / "configs" / "specs"))


def available_profiles() -> list[str]:
    return sorted(p.stem for p in profiles_dir().glob("*.toml"))


#: Tolerances the stages ask for (ctx.tolerance) that no shipped profile sets.
CODE_TOLERANCES = ("diurnal_station_difference_nT", "diurnal_time_offset_s")


def known_spec_keys() -> set[str]:
    """Every tolerance name an override may set: the keys of all shipped profiles, plus
    :data:`CODE_TOLERANCES`."""
    keys = set(CODE_TOLERANCES)
    for path in profiles_dir().glob("*.toml"):
        try:
            keys |= set(tomllib.loads(path.read_text(encoding="utf-8")))
        except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError):
            continue
    return keys


def load_spec(config, survey=None) -> dict[str, tuple[float, str]]:
    """Tolerances in force: name -> (value, source)."""
    name = config.survey.spec
    if name == "auto":
        name = DEFAULT_PROFILE[config.kind]
    path = profiles_dir() / f"{name}.toml"
    if not path.is_file() and survey is not None:
        path = survey.resolve(name)
    if not path.is_file():
        raise ConfigError(
            f"spec profile '{name}' not found",
            key="survey.spec",
            fix=f"use one of {', '.join(available_profiles())} or a path to a profile file",
        )
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise ConfigError(
            f"{path}: not a valid UTF-8 TOML spec profile ({err})", fix="correct the profile file"
        ) from None
    spec = {}
    for key, entry in data.items():
        if not isinstance(entry, dict) or "value" not in entry:
            raise ConfigError(f"{path}: entry '{key}' needs value and source")
        value = entry["value"]
        if isinstance(value, bool) or not isinstance(value, (int, float)) or math.isnan(value):
            raise ConfigError(
                f"{path}: entry '{key}' value {value!r} is not a number", fix="give the tolerance as a number"
            )
        spec[key] = (float(value), str(entry.get("source", "common practice")))
    known = known_spec_keys() | set(spec)
    for key, value in config.survey.spec_overrides.items():
        if key not in known:
            import difflib

            close = difflib.get_close_matches(key, sorted(known), n=1, cutoff=0.5)
            hint = f"did you mean '{close[0]}'?" if close else f"valid: {', '.join(sorted(known))}"
            raise ConfigError(
                f"unknown spec value '{key}'; {hint}",
                key=f"survey.spec_overrides.{key}",
                fix="use a tolerance name of a profile in configs/specs/",
            )
        spec[key] = (float(value), "survey.toml override")
    return spec
