"""The configuration: one TOML file validated once at the edge (tasks/config/). Unknown keys and bad
values stop with the key's name; configs/example.toml is generated from the schema and must match it."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from tasks.config import Config, ConfigError, parse_config
from tasks.config.example import render_example

REPO = Path(__file__).resolve().parents[1]


def test_example_config_is_the_schema() -> None:
    """Regenerate with `python -m tasks.config > configs/example.toml` when this fails."""
    assert (REPO / "configs" / "example.toml").read_text() == render_example()
    assert parse_config(tomllib.loads(render_example())) == Config()


def test_an_unknown_key_is_named_with_where_to_look() -> None:
    with pytest.raises(ConfigError, match=r"model\.dimm: unknown key .*configs/example.toml"):
        parse_config({"model": {"dimm": 8}}, source="night.toml")


@pytest.mark.parametrize("key, value", [
    ("scale.min", 5.0),                          # min == max
    ("scale.min", 6.0),                          # min > max
    ("debias.profile_points", 1),
    ("debias.profile_points", 0),
    ("debias.profile_sharpness", 0.0),
    ("debias.profile_sharpness", -0.1),
    ("debias.reference_temperature", -1.0),
    ("debias.reference_temperature", 0.0),
    ("debias.calibration_weight", -0.5),
    ("debias.probe_weight", -1.0),
    ("debias.probe_target_weight", -1.0),
    ("debias.shrinkage", -2.0),
    ("debias.reference_p_min", -0.1),
    ("debias.reference_p_max", 1.5),
    ("model.weight_decay", -0.01),
    ("model.learning_rate", 0.0),
])
def test_bad_config_values_raise_config_error_naming_the_key(key: str, value: object) -> None:
    with pytest.raises(ConfigError) as info:
        Config().updated({key: value})
    assert key in str(info.value)
    section, name = key.split(".")
    with pytest.raises(ConfigError, match=rf"{section}\.{name}"):
        parse_config({section: {name: value}}, source="night.toml")


def test_reference_probability_range_must_be_ordered() -> None:
    with pytest.raises(ConfigError, match="reference_p_min must not exceed debias.reference_p_max"):
        Config().updated({"debias.reference_p_min": 0.8, "debias.reference_p_max": 0.2})


def test_per_user_does_not_take_recalibrate_as_a_companion() -> None:
    with pytest.raises(ConfigError, match="combine_with"):
        Config().updated({"debias.method": "per_user", "debias.combine_with": "recalibrate"})
