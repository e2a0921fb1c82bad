"""Nightly training unit: split the window into organic and probe ratings, fine-tune the candidate from
the base version's checkpoint, and train the plain shadow model beside it (warm-started from the base
version's shadow). Plain functions over the engine; the flow wraps them as Prefect tasks.

Warm or cold: a night warm-starts from its base unless ``model.refit_every`` says the base has had that
many warm-started nights since its last cold fit (then candidate and shadow start cold); with
``model.cold_candidate`` a warm-started night also trains a cold candidate and keeps the one with the lower
probe-fit MAE of its served score. The count travels in the checkpoint (``info["warm_nights"]``)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
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


def warm_nights(base: Checkpoint | None) -> int:
    """Warm-started nights behind ``base`` since its last cold fit (0 for a cold fit or no base)."""
    return int(base.info.get("warm_nights", 0)) if base is not None else 0


def refit_due(base: Checkpoint | None, refit_every: int) -> bool:
    """Should tonight start cold although a base exists? (``model.refit_every`` nights since the last cold fit.)"""
    return base is not None and refit_every > 0 and warm_nights(base) + 1 >= refit_every


def probe_fit_mae(result: FitResult) -> float:
    """MAE of the served score on the run's probe fitting split (inf without one)."""
    pf = result.probe_fit
    if pf.empty:
        return float("inf")
    pred, _ = result.checkpoint.score(pf["user_id"].to_numpy(), pf["item_id"].to_numpy())
    return float(np.mean(np.abs(pred - pf["rating"].to_numpy(float))))


def train_night(window: pd.DataFrame, cfg: Config, base: Checkpoint | None, base_shadow: Checkpoint | None,
                log=None) -> TrainedNight:
    organic, probe = split_sources(window)
    settings = engine_settings(cfg)
    note = None
    if refit_due(base, cfg.model.refit_every):
        note = (f"cold refit: {warm_nights(base) + 1} nights since the last cold fit "
                f"(model.refit_every = {cfg.model.refit_every})")
        base, base_shadow = None, None
    candidate = fit(organic, probe, settings, previous=base, log=log)
    nights = warm_nights(base) + 1 if base is not None else 0
    if base is not None and cfg.model.cold_candidate:
        cold = fit(organic, probe, settings, previous=None, log=None)
        warm_err, cold_err = probe_fit_mae(candidate), probe_fit_mae(cold)
        if cold_err < warm_err:
            note = f"cold candidate kept: probe-fit MAE {cold_err:.4f} < warm {warm_err:.4f} (model.cold_candidate)"
            candidate, nights = cold, 0
    candidate.checkpoint.info["warm_nights"] = nights
    if note:
        candidate.notes.append(note)
    shadow = None
    if cfg.runtime.shadow:
        plain = settings.updated({"debias.method": "plain", "debias.combine_with": "none"})
        shadow = fit(organic, probe, plain, previous=base_shadow, log=None)
    return TrainedNight(candidate=candidate, shadow=shadow)
