"""The pipeline's config, converted at the engine's edge: the engine takes its own settings objects
(``tasks/engine/settings.py``) and imports nothing of the pipeline, so the train stage hands it the
values of the three config sections it reads, field by field."""

from __future__ import annotations

from dataclasses import fields

from tasks.config import Config
from tasks.engine.settings import DebiasSettings, ModelSettings, Scale, Settings


def engine_settings(cfg: Config) -> Settings:
    """The engine's settings from ``cfg.scale``, ``cfg.model`` and ``cfg.debias`` (keys of the same names;
    tests/train/test_settings.py checks that every engine field has its config key)."""
    def section(cls: type, values: object):
        return cls(**{f.name: getattr(values, f.name) for f in fields(cls)})

    return Settings(scale=section(Scale, cfg.scale), model=section(ModelSettings, cfg.model),
                    debias=section(DebiasSettings, cfg.debias))
