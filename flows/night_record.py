"""The typed record of one night, kept while the nightly flow runs and returned (as a dict) when it ends.

:class:`NightRecord` is the ledger's :class:`~tasks.ledger.RunRecord` (status, version, counts, stage
durations, message) plus what the night found: held-out errors, the gate decision, alerts and epoch
times. ``ledger.recorded(ws, NightRecord(...))`` keeps its ledger row; ``to_dict()`` is what the
``nightly`` flow returns to its callers (CLI, backfill, sweep, benchmarks).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from tasks.engine.trainer import FitResult
from tasks.evaluate.evaluation import Evaluation
from tasks.evaluate.gate import GateDecision
from tasks.ingest.logs import IngestResult
from tasks.ledger import RunRecord
from tasks.train.training import TrainedNight


@dataclass
class NightRecord(RunRecord):
    """One night: the ledger's fields, and ``evaluation`` / ``gate`` once evaluated, ``alerts`` (one
    line each), ``epoch_seconds`` per model, ``shared`` (the shared-copy push: files, bytes, removed,
    seconds) when ``paths.shared`` is set."""

    evaluation: Evaluation | None = None
    gate: GateDecision | None = None
    alerts: list[str] = field(default_factory=list)
    epoch_seconds: dict[str, list[float]] = field(default_factory=dict)
    shared: dict | None = None

    def outcome(self) -> str:
        """``night <date> is <status> here`` plus the version and its state, for messages."""
        version = f" (version {self.version_id}, {self.state})" if self.version_id else ""
        return f"night {self.run_date} is {self.status} here{version}"

    def to_dict(self) -> dict:
        """Plain data: ``run_date``, ``kind``, ``status``, ``version_id``, ``state``, ``message`` (the gate's
        reason on a done night), ``gate`` and ``evaluation`` (dicts as in the manifest, None before
        evaluation), ``counts``, ``durations``, ``alerts``, ``epoch_seconds``, ``shared``."""
        return {"run_date": self.run_date, "kind": self.kind, "status": self.status, "version_id": self.version_id,
                "state": self.state, "message": self.message,
                "gate": self.gate.to_dict() if self.gate else None,
                "evaluation": self.evaluation.to_dict() if self.evaluation else None,
                "counts": dict(self.counts), "durations": dict(self.durations), "alerts": list(self.alerts),
                "epoch_seconds": dict(self.epoch_seconds), "shared": self.shared}


def input_counts(ingested: IngestResult) -> dict[str, int]:
    """Rows read from the night's partition, stored, and quarantined."""
    return {"rows_read": ingested.rows_read, "rows_ingested": ingested.rows_valid,
            "rows_quarantined": len(ingested.rejected)}


def training_counts(window: pd.DataFrame, candidate: FitResult, predictions: pd.DataFrame) -> dict[str, int]:
    """The window's ratings, users and items, the candidate's new ids and probe split, predictions made."""
    return {"window_ratings": len(window), "window_users": int(window["user_id"].nunique()),
            "window_items": int(window["item_id"].nunique()), "new_users": candidate.new_users,
            "new_items": candidate.new_items, "heldout_probe": len(candidate.probe_heldout),
            "fit_probe": len(candidate.probe_fit), "predictions": len(predictions)}


def epoch_seconds(trained: TrainedNight) -> dict[str, list[float]]:
    """Seconds per training round of the candidate and of the shadow model (empty when not trained)."""
    return {"candidate": [r["seconds"] for r in trained.candidate.rounds],
            "shadow": [r["seconds"] for r in trained.shadow.rounds] if trained.shadow else []}
