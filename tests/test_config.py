"""survey.toml schema: defaults, unknown keys with suggestions, wrong types, templates."""

from __future__ import annotations

import tomllib

import pytest

from potfield.config import SurveyConfig, load_config, parse_config
from potfield.errors import ConfigError
from potfield.qc.specs import available_profiles, load_spec


def test_defaults_fill_every_section():
    config = parse_config({"survey": {"kind": "magnetic"}})
    assert config.survey.crs == "EPSG:4326"
    assert config.survey.output_crs == "auto"
    assert config.input.time.format == "iso"
    assert config.reference.density == 2670.0  # common practice (Hinze et al. 2005 standard density)


def test_unknown_key_suggests_nearest():
    with pytest.raises(ConfigError) as err:
        parse_config({"survey": {"kind": "magnetic", "ouput_crs": "auto"}})
    assert "did you mean 'output_crs'" in str(err.value)
    assert "\n" not in str(err.value)


def test_unknown_section_suggests_nearest():
    with pytest.raises(ConfigError, match="did you mean 'diurnal'"):
        parse_config({"survey": {"kind": "magnetic"}, "diurnall": {}})


def test_wrong_type_names_key_and_type():
    with pytest.raises(ConfigError) as err:
        parse_config({"survey": {"kind": "magnetic"}, "clean": {"spike_window": "eleven"}})
    text = str(err.value)
    assert "clean.spike_window" in text and "integer" in text


def test_wrong_unit_name():
    with pytest.raises(ConfigError, match="unit 'nanotesla' for total_field is not known"):
        parse_config({"survey": {"kind": "magnetic"}, "input": {"units": {"total_field": "nanotesla"}}})


def test_unknown_canonical_column_suggests():
    with pytest.raises(ConfigError, match="did you mean 'total_field'"):
        parse_config({"survey": {"kind": "magnetic"}, "input": {"columns": {"totalfield": "TMI"}}})


def test_missing_kind_is_required():
    with pytest.raises(ConfigError, match="survey.kind' is required"):
        parse_config({"survey": {"name": "x"}})


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="no survey.toml here"):
        load_config(tmp_path / "survey.toml")


def test_bad_toml_syntax(tmp_path):
    path = tmp_path / "survey.toml"
    path.write_text("[survey\nkind = 'magnetic'\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(path)


@pytest.mark.parametrize("kind", ["magnetic", "gravity", "observatory"])
def test_templates_are_valid(kind):
    from importlib import resources

    text = (resources.files("potfield") / "data" / "configs" / f"{kind}.toml").read_text()
    config = SurveyConfig.model_validate(tomllib.loads(text))
    assert config.kind == kind


def test_spec_profiles_and_overrides():
    assert {"airborne-magnetic", "ground-magnetic", "ground-gravity", "observatory"} <= set(
        available_profiles()
    )
    config = parse_config(
        {"survey": {"kind": "magnetic", "spec_overrides": {"noise_fourth_difference_nT": 0.3}}}
    )
    spec = load_spec(config)
    assert spec["noise_fourth_difference_nT"] == (0.3, "survey.toml override")
    assert spec["diurnal_chord_15s_nT"][0] == 0.5  # common practice (references.md QC tolerances)
    with pytest.raises(ConfigError, match="spec profile 'nope' not found"):
        load_spec(parse_config({"survey": {"kind": "magnetic", "spec": "nope"}}))


def test_section_hash_changes_only_with_its_sections():
    a = parse_config({"survey": {"kind": "magnetic"}})
    b = parse_config({"survey": {"kind": "magnetic"}, "grid": {"spacing_m": 50.0}})
    assert a.section_hash("clean") == b.section_hash("clean")
    assert a.section_hash("grid") != b.section_hash("grid")
