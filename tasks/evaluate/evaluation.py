"""Held-out probe evaluation of candidate, shadow and live models, overall and per skew segment.

The result is typed (:class:`Evaluation` of :class:`ModelErrors`); ``to_dict()`` gives the JSON that
manifests record under ``metrics`` (JSON read back from a manifest stays a plain dict).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import pandas as pd

from tasks.config import EvaluateConfig
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.metrics import segmented_errors
from tasks.evaluate.anchor import AnchorComparison

#: Models in the order they are scored and recorded.
MODELS = ("candidate", "shadow", "live")


@dataclass(frozen=True)
class Errors:
    """Errors of one model on a set of held-out probe ratings: ``n`` ratings; MAE and RMSE in stars with
    their percentile bootstrap bounds (NaN without a bootstrap or with fewer than two ratings)."""

    n: int
    mae: float
    rmse: float
    mae_lo: float
    mae_hi: float
    rmse_lo: float
    rmse_hi: float

    @classmethod
    def from_dict(cls, d: Mapping) -> Errors:
        """From ``engine.metrics.bootstrap_errors`` output (extra keys ignored)."""
        return cls(n=int(d["n"]), mae=d["mae"], rmse=d["rmse"], mae_lo=d["mae_lo"], mae_hi=d["mae_hi"],
                   rmse_lo=d["rmse_lo"], rmse_hi=d["rmse_hi"])

    def to_dict(self) -> dict:
        return {"n": self.n, "mae": self.mae, "rmse": self.rmse, "mae_lo": self.mae_lo, "mae_hi": self.mae_hi,
                "rmse_lo": self.rmse_lo, "rmse_hi": self.rmse_hi}


@dataclass(frozen=True)
class ModelErrors(Errors):
    """:class:`Errors` overall plus per selection-skew segment label (``segments.SEGMENTS``; only
    labels that occur among the held-out ratings)."""

    segments: Mapping[str, Errors] = field(default_factory=dict)

    @classmethod
    def from_dict(cls, d: Mapping) -> ModelErrors:
        """From ``engine.metrics.segmented_errors`` output."""
        overall = Errors.from_dict(d)
        return cls(**vars(overall), segments={str(k): Errors.from_dict(v) for k, v in (d.get("segments") or {}).items()})

    def to_dict(self) -> dict:
        return {**super().to_dict(), "segments": {k: v.to_dict() for k, v in self.segments.items()}}


@dataclass(frozen=True)
class Evaluation:
    """One night's held-out errors of the candidate, the plain shadow model and the live version (None:
    that model does not exist tonight). All three are scored on the same pairs with the same seed.
    ``anchor``: the candidate against the strongest recent version on the same pairs (``anchor.py``;
    None when there is none, e.g. the first night or ``gate.anchor_nights = 0``)."""

    candidate: ModelErrors
    shadow: ModelErrors | None = None
    live: ModelErrors | None = None
    anchor: AnchorComparison | None = None

    def models(self) -> dict[str, ModelErrors | None]:
        """``{"candidate": ..., "shadow": ..., "live": ...}`` in :data:`MODELS` order."""
        return {name: getattr(self, name) for name in MODELS}

    def to_dict(self) -> dict:
        """The manifest's ``metrics``: ``{model: errors dict or None}``, plus ``"anchor"`` (the
        comparison's dict) when there is an anchor."""
        out = {name: None if e is None else e.to_dict() for name, e in self.models().items()}
        if self.anchor is not None:
            out["anchor"] = self.anchor.to_dict()
        return out


def evaluate_models(heldout: pd.DataFrame, segments: pd.Series, candidate: Checkpoint, shadow: Checkpoint | None,
                    live: Checkpoint | None, cfg: EvaluateConfig, seed: int) -> Evaluation:
    """Score each model on the held-out probe ratings, overall and per segment.

    ``heldout``: probe ratings (user_id, item_id, rating in stars) never used in training; ``segments``:
    user_id -> segment label (``segments.user_skew_segments``); users without one count as "unknown".
    Every model gets the same bootstrap seed, so their intervals are comparable.
    """
    seg = heldout["user_id"].map(segments).fillna("unknown").to_numpy()
    y = heldout["rating"].to_numpy(float)

    def errors(ckpt: Checkpoint | None) -> ModelErrors | None:
        if ckpt is None:
            return None
        pred, _ = ckpt.score(heldout["user_id"], heldout["item_id"])
        return ModelErrors.from_dict(segmented_errors(pred, y, seg, cfg.bootstrap, cfg.confidence, seed))

    return Evaluation(candidate=errors(candidate), shadow=errors(shadow), live=errors(live))
