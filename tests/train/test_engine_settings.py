"""The config converts to the engine's settings at the edge: every engine setting is a config key of the
same name, type and default, and every value the config holds reaches the engine."""

from __future__ import annotations

import dataclasses
import typing

import pytest

from tasks.config import Config
from tasks.engine.settings import SECTIONS, Settings
from tasks.train.settings import engine_settings

#: A value other than the default for every engine setting (each valid for the config); a new engine
#: setting must be added here, which the test below checks.
CHANGED = {
    "scale.min": 0.0, "scale.max": 10.0, "scale.step": 0.5,
    "model.dim": 5, "model.learning_rate": 0.03, "model.weight_decay": 0.1, "model.batch_size": 99,
    "model.max_epochs": 7, "model.finetune_epochs": 3, "model.patience": 2, "model.init_scale": 0.2,
    "model.seed": 11, "model.threads": 2, "model.stop_on": "raw", "model.keep_base": True,
    "debias.method": "calibrated", "debias.calibration_weight": 2.5, "debias.profile_points": 12,
    "debias.profile_sharpness": 0.3, "debias.reference_temperature": 0.7, "debias.reference_p_min": 0.05,
    "debias.reference_p_max": 0.8, "debias.shrinkage": 2.0, "debias.profile_item_sample": 64,
    "debias.users_per_step": 32, "debias.memory_budget_mb": 64.0, "debias.max_reference_users": 100,
    "debias.probe_target_weight": 0.4, "debias.combine_with": "snips", "debias.probe_weight": 3.0,
    "debias.propensity_clip": 0.1, "debias.heldout_share": 0.2, "debias.per_user_design": "offset",
    "debias.per_user_prior": 4.0, "debias.per_user_min_probes": 12,
}


def _engine_keys() -> list[tuple[str, dataclasses.Field]]:
    return [(section, f) for section, cls in SECTIONS.items() for f in dataclasses.fields(cls)]


@pytest.mark.parametrize("section, field", _engine_keys(), ids=lambda x: getattr(x, "name", x))
def test_every_engine_setting_is_a_config_key_of_the_same_type_and_default(section: str, field) -> None:
    config_section = type(getattr(Config(), section))
    assert field.name in config_section.model_fields, f"{section}.{field.name}: no config key of that name"
    engine_type = typing.get_type_hints(SECTIONS[section])[field.name]
    assert engine_type == config_section.model_fields[field.name].annotation, f"{section}.{field.name}"
    assert field.default == config_section.model_fields[field.name].default, f"{section}.{field.name}"


def test_defaults_convert_to_the_engine_defaults() -> None:
    assert engine_settings(Config()) == Settings()


def test_every_value_reaches_the_engine_and_back() -> None:
    assert sorted(CHANGED) == sorted(f"{s}.{f.name}" for s, f in _engine_keys())
    cfg = Config().updated(CHANGED)
    settings = engine_settings(cfg)
    for key, value in CHANGED.items():
        section, name = key.split(".")
        assert getattr(getattr(settings, section), name) == value != getattr(getattr(Settings(), section), name), key
    # Round trip: the engine's values written back over the defaults give the same config.
    back = {f"{s}.{f.name}": getattr(getattr(settings, s), f.name) for s, f in _engine_keys()}
    assert Config().updated(back) == cfg
    assert settings == Settings().updated(CHANGED)
