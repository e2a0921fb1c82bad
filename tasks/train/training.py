"""Nightly training unit: split the window into organic and probe ratings, fine-tune the candidate from
the base version's checkpoint, and train the plain shadow model beside it (warm-started from the base
version's shadow). Plain functions over the engine; the flow wraps them as Prefect tasks."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from tasks.config import Config
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.trainer import FitResult, fit
from tasks.schemas import ORGANIC, PROBE
from tasks.train.settings import engine_settings


@dataclass
class TrainedNight:
    candidate: FitResult
    shadow: FitResult | None


def split_sources(window: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    cols = ["user_id", "item_id", "rating"]
    return (window.loc[window["source"] == ORGANIC, cols].reset_index(drop=True),
            window.loc[window["source"] == PROBE, cols].reset_index(drop=True))


def train_night(window: pd.DataFrame, cfg: Config, base: Checkpoint | None, base_shadow: Checkpoint | None,
                log=None) -> TrainedNight:
    organic, probe = split_sources(window)
    settings = engine_settings(cfg)
    candidate = fit(organic, probe, settings, previous=base, log=log)
    shadow = None
    if cfg.runtime.shadow:
        plain = settings.updated({"debias.method": "plain", "debias.combine_with": "none"})
        shadow = fit(organic, probe, plain, previous=base_shadow, log=None)
    return TrainedNight(candidate=candidate, shadow=shadow)
