"""The engine's own settings: exactly what training reads, as small frozen dataclasses (no pydantic).

The pipeline validates its TOML config (``tasks/config/``) and converts the three sections the engine
reads at its edge (``tasks/train/settings.py: engine_settings``); the engine itself imports nothing of
the pipeline. Field names, types and defaults are those of the config keys of the same name
(``scale.*``, ``model.*``, ``debias.*``), where each is documented with its range;
tests/train/test_settings.py fails when the two drift apart.

    settings = Settings().updated({"model.dim": 8, "debias.method": "plain"})
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields, replace
from typing import Literal

#: The debiasing methods the trainer runs (``debias.method``).
Method = Literal["plain", "probe_upweight", "ips", "snips", "recalibrate", "calibrated", "per_user"]
#: Probe options trained alongside ``calibrated`` or under ``per_user`` (``debias.combine_with``).
Companion = Literal["none", "probe_upweight", "ips", "snips", "recalibrate"]
#: Designs of the per-user correction (``debias.per_user_design``; tasks/engine/per_user.py).
PerUserDesign = Literal["offset", "skew_offset", "skew_affine"]
#: What early stopping reads (``model.stop_on``): the raw factoriser's probe-fit MAE or the served score's.
StopOn = Literal["raw", "corrected"]


@dataclass(frozen=True)
class Scale:
    """The rating scale: ``min`` and ``max`` in rating units, ``step`` between levels (0 = continuous)."""

    min: float = 1.0
    max: float = 5.0
    step: float = 1.0


@dataclass(frozen=True)
class ModelSettings:
    """The factoriser and its optimisation (config section ``model``)."""

    dim: int = 16
    learning_rate: float = 0.02
    weight_decay: float = 0.2
    batch_size: int = 1024
    max_epochs: int = 40
    finetune_epochs: int = 8
    patience: int = 4
    init_scale: float = 0.05
    seed: int = 7
    threads: int = 1
    stop_on: StopOn = "corrected"
    keep_base: bool = False


@dataclass(frozen=True)
class DebiasSettings:
    """The debiasing method and its knobs (config section ``debias``)."""

    method: Method = "per_user"
    calibration_weight: float = 1.0
    profile_points: int = 10
    profile_sharpness: float = 0.1
    reference_temperature: float = 0.3
    reference_p_min: float = 0.01
    reference_p_max: float = 0.9
    shrinkage: float = 5.0
    profile_item_sample: int = 256
    users_per_step: int = 256
    memory_budget_mb: float = 256.0
    max_reference_users: int = 1024
    probe_target_weight: float = 0.0
    combine_with: Companion = "none"
    probe_weight: float = 5.0
    propensity_clip: float = 0.05
    heldout_share: float = 0.3
    per_user_design: PerUserDesign = "skew_affine"
    per_user_prior: float = 0.0
    per_user_min_probes: int = 30

    @property
    def companion(self) -> str:
        """The probe option trained alongside the method: ``combine_with`` for the two methods that take
        one (calibrated, per_user), else "none"."""
        return self.combine_with if self.method in ("calibrated", "per_user") else "none"


@dataclass(frozen=True)
class Settings:
    """Everything one training run reads."""

    scale: Scale = field(default_factory=Scale)
    model: ModelSettings = field(default_factory=ModelSettings)
    debias: DebiasSettings = field(default_factory=DebiasSettings)

    def updated(self, dotted: dict[str, object]) -> Settings:
        """Copy with ``{"debias.method": "plain", "model.dim": 8, ...}`` applied: the config's key names, as
        in ``Config.updated``. An unknown key raises ``KeyError`` naming it."""
        sections: dict[str, dict[str, object]] = {}
        for key, value in dotted.items():
            section, _, name = key.partition(".")
            if section not in SECTIONS or name not in {f.name for f in fields(SECTIONS[section])}:
                raise KeyError(f"unknown engine setting '{key}': the engine reads "
                               f"{', '.join(f'{s}.*' for s in SECTIONS)} keys of the same names as the config")
            sections.setdefault(section, {})[name] = value
        return replace(self, **{s: replace(getattr(self, s), **values) for s, values in sections.items()})


#: The config sections the engine reads, by name.
SECTIONS = {"scale": Scale, "model": ModelSettings, "debias": DebiasSettings}
