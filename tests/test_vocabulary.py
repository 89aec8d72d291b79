"""Own vocabulary: renamed survey.toml keys and products still accept the old names, each with one
warning that names the new one; templates use the new names only."""

from __future__ import annotations

import tomllib
import warnings
from importlib import resources

import pytest

from potfield.config import RenamedKeyWarning, parse_config
from potfield.errors import ConfigError


def test_old_grid_keys_are_accepted_with_one_warning_each():
    with pytest.warns(RenamedKeyWarning) as caught:
        config = parse_config(
            {
                "survey": {"kind": "magnetic"},
                "grid": {"depth_type": "constant", "depth_factors": [3.0], "dampings": [0.1]},
            }
        )
    assert len(caught) == 3
    assert "use 'source_layer = \"flat\"'" in str(caught[0].message)
    assert config.grid.source_layer == "flat"
    assert config.grid.trial_depths == [3.0] and config.grid.trial_dampings == [0.1]


def test_new_names_give_no_warning_and_both_names_are_refused():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        config = parse_config(
            {"survey": {"kind": "magnetic"}, "grid": {"source_layer": "follow_drape", "trial_depths": [4.5]}}
        )
    assert config.grid.source_layer == "follow_drape"
    with pytest.raises(ConfigError, match="keep only 'trial_depths'"):
        parse_config(
            {"survey": {"kind": "magnetic"}, "grid": {"depth_factors": [3.0], "trial_depths": [4.5]}}
        )


@pytest.mark.parametrize("kind", ["magnetic", "gravity", "observatory"])
def test_templates_use_descriptive_names_only(kind):
    text = (resources.files("potfield") / "data" / "configs" / f"{kind}.toml").read_text()
    data = tomllib.loads(text)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # an old name in a template would warn
        parse_config(data)
    for name in data.get("input", {}).get("columns", {}).values():
        assert name.replace("nT", "nt") == name.replace("nT", "nt").lower(), f"{name}: use snake_case"
