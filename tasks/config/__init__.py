"""tarewise configuration: one TOML file, validated once at the edge, passed down typed.

Every key is typed, ranged and documented in this package (``data.py``: where the data comes from;
``learning.py``: the model and its judgement; ``operations.py``: running unattended); ``configs/example.toml`` shows each with its default.
An unknown key or a bad value raises :class:`ConfigError` naming the key path (``model.dim``) and what
is allowed. Nothing below imports Prefect, so the engine can take these objects directly.
"""

from __future__ import annotations

import hashlib
import json
import os
import tomllib
from pathlib import Path

from pydantic import ValidationError

from tasks.config.base import ConfigError, _Section, format_error
from tasks.config.data import SHARED_SCHEMES, ColumnsConfig, InputConfig, PathsConfig, ScaleConfig, WindowConfig
from tasks.config.learning import (DebiasConfig, DebiasMethod, EvaluateConfig, GateConfig, ModelConfig, ProbeConfig,
                                   PublishConfig, RetentionConfig)
from tasks.config.operations import (AlertsConfig, DriftConfig, LabelsConfig, RuntimeConfig, check_cron,
                                     check_timezone)

#: The package's public surface: the root config, loading, and every section (their modules group them).
__all__ = ["AlertsConfig", "ColumnsConfig", "Config", "ConfigError", "DebiasConfig", "DebiasMethod", "DriftConfig",
           "EvaluateConfig", "GateConfig", "InputConfig", "LabelsConfig", "ModelConfig", "PathsConfig", "ProbeConfig",
           "PublishConfig", "RetentionConfig", "RuntimeConfig", "SHARED_SCHEMES", "ScaleConfig", "WindowConfig",
           "check_cron", "check_timezone", "load_config", "parse_config"]

class Config(_Section):
    paths: PathsConfig = PathsConfig()
    input: InputConfig = InputConfig()
    scale: ScaleConfig = ScaleConfig()
    window: WindowConfig = WindowConfig()
    model: ModelConfig = ModelConfig()
    debias: DebiasConfig = DebiasConfig()
    evaluate: EvaluateConfig = EvaluateConfig()
    gate: GateConfig = GateConfig()
    probe: ProbeConfig = ProbeConfig()
    publish: PublishConfig = PublishConfig()
    retention: RetentionConfig = RetentionConfig()
    runtime: RuntimeConfig = RuntimeConfig()
    drift: DriftConfig = DriftConfig()
    alerts: AlertsConfig = AlertsConfig()
    labels: LabelsConfig = LabelsConfig()

    def with_overrides(self, logs: str | None = None, workspace: str | None = None,
                       shared: str | None = None) -> "Config":
        """Copy with the paths replaced (CLI flags win over env vars, which win over the file).
        ``shared=""`` turns the shared copy off; ``None`` leaves it as it is."""
        update = {k: v for k, v in {"logs": logs, "workspace": workspace}.items() if v}
        if shared is not None:
            update["shared"] = shared
        paths = PathsConfig.model_validate({**self.paths.model_dump(), **update}) if update else self.paths
        return self.model_copy(update={"paths": paths})

    def updated(self, dotted: dict[str, object]) -> "Config":
        """Copy with ``{"debias.calibration_weight": 2.0, ...}`` applied and re-validated (used by sweeps)."""
        raw = self.model_dump()
        for key, value in dotted.items():
            node = raw
            parts = key.split(".")
            for p in parts[:-1]:
                if p not in node or not isinstance(node[p], dict):
                    raise ConfigError(f"unknown config key '{key}'")
                node = node[p]
            if parts[-1] not in node:
                raise ConfigError(f"unknown config key '{key}'")
            node[parts[-1]] = value
        return parse_config(raw, source="<override>")

    def digest(self) -> str:
        """Stable short hash of every setting except the paths (which vary by environment)."""
        raw = self.model_dump(mode="json")
        raw.pop("paths", None)
        return hashlib.sha256(json.dumps(raw, sort_keys=True).encode()).hexdigest()[:16]



def parse_config(raw: dict, source: str = "<dict>") -> Config:
    try:
        return Config.model_validate(raw)
    except ValidationError as err:
        raise ConfigError(format_error(err, source)) from None


def load_config(path: str | Path | None = None, logs: str | None = None, workspace: str | None = None,
                shared: str | None = None) -> Config:
    """Read and validate a TOML config (defaults when ``path`` is None); apply path overrides.

    Precedence for the paths: explicit argument > TAREWISE_LOGS / TAREWISE_WORKSPACE / TAREWISE_SHARED > file.
    """
    raw: dict = {}
    source = "<defaults>"
    if path is not None:
        p = Path(path)
        source = str(p)
        try:
            raw = tomllib.loads(p.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"config file not found: {p}") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"config file {p} is not valid TOML: {exc}") from None
    cfg = parse_config(raw, source)
    try:
        return cfg.with_overrides(logs=logs or os.environ.get("TAREWISE_LOGS"),
                                  workspace=workspace or os.environ.get("TAREWISE_WORKSPACE"),
                                  shared=shared if shared is not None else os.environ.get("TAREWISE_SHARED"))
    except ValidationError as err:
        raise ConfigError(format_error(err, "command line / environment", ("paths",))) from None
