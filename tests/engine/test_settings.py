"""The engine's settings objects: defaults, copies with keys replaced, the companion of a method.
(That they match the pipeline config key for key: tests/train/test_engine_settings.py.)"""

from __future__ import annotations

import dataclasses

import pytest

from tasks.engine.settings import SECTIONS, DebiasSettings, Settings


def test_updated_replaces_named_keys_and_leaves_the_original_alone() -> None:
    base = Settings()
    new = base.updated({"model.dim": 8, "debias.method": "plain", "scale.max": 10.0})
    assert (new.model.dim, new.debias.method, new.scale.max) == (8, "plain", 10.0)
    assert (base.model.dim, base.debias.method, base.scale.max) == (16, "per_user", 5.0)
    # Everything not named is carried over.
    assert dataclasses.replace(new.model, dim=16) == base.model
    assert new.debias == dataclasses.replace(base.debias, method="plain")
    assert base.updated({}) == base


@pytest.mark.parametrize("key", ["model.dimension", "debias", "window.days", "dim"])
def test_an_unknown_key_is_an_error_naming_it(key: str) -> None:
    with pytest.raises(KeyError, match=f"unknown engine setting '{key}'"):
        Settings().updated({key: 1})


def test_settings_are_frozen() -> None:
    with pytest.raises(dataclasses.FrozenInstanceError):
        Settings().model.dim = 3                 # type: ignore[misc]
    assert set(SECTIONS) == {f.name for f in dataclasses.fields(Settings)}


@pytest.mark.parametrize("method, combine_with, companion", [
    ("calibrated", "ips", "ips"), ("per_user", "snips", "snips"), ("calibrated", "none", "none"),
    # Only calibrated and per_user take a companion; the others ignore combine_with.
    ("plain", "ips", "none"), ("recalibrate", "probe_upweight", "none"), ("snips", "recalibrate", "none"),
])
def test_companion_is_combine_with_for_the_two_methods_that_take_one(method, combine_with, companion) -> None:
    assert DebiasSettings(method=method, combine_with=combine_with).companion == companion
