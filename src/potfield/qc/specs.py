"""Spec profiles: named tolerances with their source, from configs/specs/*.toml.

A profile is chosen in survey.toml (``[survey] spec = "airborne-magnetic"``; ``"auto"`` picks one
by survey kind) and single values are overridden with ``[survey] spec_overrides``.
"""

from __future__ import annotations

import tomllib
from importlib import resources
from pathlib import Path

from ..errors import ConfigError

DEFAULT_PROFILE = {"magnetic": "airborne-magnetic", "gravity": "ground-gravity",
                   "observatory": "observatory"}


def profiles_dir() -> Path:
    return Path(str(resources.files("potfield") / "data" / "configs" / "specs"))


def available_profiles() -> list[str]:
    return sorted(p.stem for p in profiles_dir().glob("*.toml"))


def load_spec(config, survey=None) -> dict[str, tuple[float, str]]:
    """Tolerances in force: name -> (value, source)."""
    name = config.survey.spec
    if name == "auto":
        name = DEFAULT_PROFILE[config.kind]
    path = profiles_dir() / f"{name}.toml"
    if not path.is_file() and survey is not None:
        path = survey.resolve(name)
    if not path.is_file():
        raise ConfigError(f"spec profile '{name}' not found", key="survey.spec",
                          fix=f"use one of {', '.join(available_profiles())} or a path to a profile file")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{path}: not valid TOML ({err})") from None
    spec = {}
    for key, entry in data.items():
        if not isinstance(entry, dict) or "value" not in entry:
            raise ConfigError(f"{path}: entry '{key}' needs value and source")
        spec[key] = (float(entry["value"]), str(entry.get("source", "common practice")))
    for key, value in config.survey.spec_overrides.items():
        spec[key] = (float(value), "survey.toml override")
    return spec
