"""Held-out probe evaluation of candidate, shadow and live models, overall and per skew segment."""

from __future__ import annotations

import pandas as pd

from tasks.config import EvaluateConfig
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.metrics import segmented_errors


def evaluate_models(heldout: pd.DataFrame, segments: pd.Series, models: dict[str, Checkpoint | None],
                    cfg: EvaluateConfig, seed: int) -> dict[str, dict | None]:
    """heldout: probe ratings (user_id, item_id, rating) never used in training.
    segments: user_id -> segment label ('up', 'down', 'neutral', 'unknown').
    Returns {name: segmented_errors dict or None (model absent)}; every model is scored on the same pairs
    with the same bootstrap seed, so their intervals are comparable."""
    seg = heldout["user_id"].map(segments).fillna("unknown").to_numpy()
    y = heldout["rating"].to_numpy(float)
    out: dict[str, dict | None] = {}
    for name, ckpt in models.items():
        if ckpt is None:
            out[name] = None
            continue
        pred, _ = ckpt.score(heldout["user_id"], heldout["item_id"])
        out[name] = segmented_errors(pred, y, seg, cfg.bootstrap, cfg.confidence, seed)
    return out
