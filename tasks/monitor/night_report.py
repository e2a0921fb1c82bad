"""The monitor stage of a night: its metrics and alert rules before the gate, then store -> deliver -> report.

Each module is visited once, in this order. Before the promotion gate decides (:func:`measure_night`):
``night_metrics`` computes tonight's row from the night's results, the stored series is read once, and
``alert_rules`` judge the row as it will be stored against it, so the gate can hold on tonight's alerts
(``gate.hold_on_alert``). After publishing (:func:`monitor_night`): ``metrics_store`` stores the row
with the candidate's state and the gate's reason, the alerts are folded into episodes and
``alert_delivery`` records and sends them (never raising for a receiver's problem), and ``report``
renders what it is given. Receivers beyond the webhook come in as channels from the flow.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import torch

from tasks.config import Config
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.profiles import soft_cdf, thresholds
from tasks.evaluate.evaluation import Evaluation
from tasks.evaluate.probe_plan import PLANS_DIR
from tasks.ingest.logs import IngestResult, rejected_by_reason
from tasks.monitor.alert_advice import with_advice
from tasks.monitor.alert_delivery import Channels, deliver_night
from tasks.monitor.alert_history import AlertHistory
from tasks.monitor.alert_rules import Alert, evaluate_alerts, fold_alerts
from tasks.monitor.metrics_store import as_stored, read_metrics, row_of, write_night_metrics
from tasks.monitor.night_metrics import compute_night_metrics, with_versions
from tasks.monitor.probe_budget_view import night_budget, with_probe_budget
from tasks.monitor.report import summary_markdown, write_report
from tasks.schemas import PROBE
from tasks.train.training import TrainedNight
from tasks.workspace import Workspace

#: Sizes of the comparison sample: enough for stable histograms and PSI, cheap at any scale.
SAMPLE_PAIRS = 20_000
SAMPLE_USERS = 500
SAMPLE_ITEMS = 256


def prediction_sample(cand: Checkpoint, live: Checkpoint | None, window: pd.DataFrame, cfg: Config,
                      seed: int) -> dict:
    """Candidate and live predictions on one uniform sample of (active user, active item) pairs, and
    both models' rating profiles (soft CDF over a shared uniform item sample) for a user sample."""
    rng = np.random.default_rng(seed)
    # Distinct ids, then sorted: the same arrays as np.unique over every row (which took 45 s at 10M ratings).
    users = np.sort(np.asarray(pd.unique(window["user_id"]), dtype=object))
    items = np.sort(np.asarray(pd.unique(window["item_id"]), dtype=object))
    pu, pi = rng.choice(users, SAMPLE_PAIRS), rng.choice(items, SAMPLE_PAIRS)
    out = {"pred_candidate": cand.score(pu, pi)[0], "pred_live": live.score(pu, pi)[0] if live else None}
    su = rng.choice(users, min(SAMPLE_USERS, len(users)), replace=False)
    si = rng.choice(items, SAMPLE_ITEMS)
    t = thresholds(cfg.scale.min, cfg.scale.max, cfg.debias.profile_points, dtype=torch.float64)

    def profiles(ckpt: Checkpoint) -> np.ndarray:
        grid_u, grid_i = np.repeat(su, len(si)), np.tile(si, len(su))
        scores = torch.from_numpy(ckpt.score(grid_u, grid_i)[0].reshape(len(su), len(si)))
        return soft_cdf(scores, t, cfg.debias.profile_sharpness).numpy()

    out["profiles_candidate"] = profiles(cand)
    out["profiles_live"] = profiles(live) if live else None
    return out


@dataclass(frozen=True)
class MonitoredNight:
    """What the monitor pass did: the final history record of each of tonight's alerts (in the order
    raised), the report page's path, and a short Markdown summary of the night (for a Prefect artifact)."""

    alerts: list[dict]
    report: Path
    markdown: str

    def alert_lines(self) -> list[str]:
        """One line per alert: ``"<severity>: <kind> - <explanation>"``."""
        return [f"{r.get('severity')}: {r.get('kind')} - {r.get('explanation', '')}" for r in self.alerts]


@dataclass(frozen=True)
class MeasuredNight:
    """Tonight before the gate: the metrics ``row`` (not stored yet; without the candidate's state and
    the gate's reason) and the raw ``alerts`` the rules raised on it (not folded into episodes, not
    delivered), each with its advice."""

    row: dict
    alerts: list[Alert]

    def alerts_for_gate(self) -> list[tuple[str, str]]:
        """``(severity, kind)`` of each alert, in the order raised: plain data for the gate."""
        return [(a.severity, a.kind) for a in self.alerts]


def judge_row(ws: Workspace, cfg: Config, row: Mapping) -> MeasuredNight:
    """The alert rules over a computed metrics ``row`` as it will be stored, against the stored series
    (read once here)."""
    return MeasuredNight(dict(row), with_advice(evaluate_alerts(as_stored(row), read_metrics(ws), cfg), cfg))


def _fold_and_deliver(history: AlertHistory, run_date: str, alerts: list[Alert], cfg: Config, kind: str,
                      channels: Channels, env: Mapping[str, str] | None) -> list[dict]:
    folded = fold_alerts(alerts, history.records, run_date, cfg.drift.cooldown_nights)
    return deliver_night(history, run_date, folded, cfg, channels, kind, env)


def alert_night(cfg: Config, tonight: Mapping, series: pd.DataFrame, history: AlertHistory, kind: str,
                channels: Channels, env: Mapping[str, str] | None = None) -> list[dict]:
    """Alert rules over tonight's stored row and the stored series, folded by cool-down against the
    history, then delivered (``kind``: the run's kind; ``env``: where the webhook URL is looked up,
    default ``os.environ``). Returns the final history records."""
    raw = with_advice(evaluate_alerts(tonight, series, cfg), cfg)
    return _fold_and_deliver(history, str(tonight["run_date"]), raw, cfg, kind, channels, env)


def monitor_night(ws: Workspace, cfg: Config, measured: MeasuredNight, kind: str, channels: Channels,
                  env: Mapping[str, str] | None = None, outcome: Mapping[str, str | None] | None = None
                  ) -> MonitoredNight:
    """After the gate: store tonight's row (with ``outcome``, e.g. ``{"state": ..., "gate": ...}``, added
    to its versions), fold the alerts :func:`judge_row` raised into episodes against the history and
    deliver them, then write the report from the stored row and series: exactly what ``tarewise report
    --date`` re-renders from storage."""
    row = with_versions(measured.row, outcome) if outcome else measured.row
    run_date = str(row["run_date"])
    series = write_night_metrics(ws, row)
    tonight = row_of(series, run_date, ws.metrics)
    history = AlertHistory.read(ws)
    records = _fold_and_deliver(history, run_date, measured.alerts, cfg, kind, channels, env)
    html, _ = write_report(ws, run_date, cfg, tonight, series, history.records)
    return MonitoredNight(alerts=records, report=html, markdown=summary_markdown(row, records, cfg.labels))


def measure_night(cfg: Config, ws: Workspace, run_date: str, window: pd.DataFrame, ingested: IngestResult,
                  trained: TrainedNight, evaluation: Evaluation, *, base: Checkpoint | None, base_id: str | None,
                  version_id: str) -> MeasuredNight:
    """Before the gate: tonight's metrics row from the night's results (``version_id``: the id the
    candidate will be published under), judged by the alert rules (:func:`judge_row`)."""
    cand = trained.candidate
    tonight = window[window["dt"] == run_date]   # categorical or text: compared as is (no text per row)
    volumes = {"rows_read": ingested.rows_read, "rows_ingested": ingested.rows_valid,
               "rows_quarantined": len(ingested.rejected),
               "quarantined_by_reason": rejected_by_reason(ingested.rejected),
               "new_users": cand.new_users, "new_items": cand.new_items,
               "active_users": int(tonight["user_id"].nunique()),
               "probe_users": int(tonight.loc[tonight["source"] == PROBE, "user_id"].nunique())}
    sample = prediction_sample(cand.checkpoint, base, window, cfg, cfg.model.seed)
    row = compute_night_metrics(
        run_date, window, cfg.scale, cfg.evaluate.skew_margin, probe_errors=cand.probe_errors,
        reference_shares=[r["reference_share"] for r in cand.rounds], evaluation=evaluation,
        volumes=volumes, versions={"candidate": version_id, "live": base_id}, **sample)
    shadow = trained.shadow.checkpoint if trained.shadow else None
    row = with_probe_budget(row, night_budget(window, run_date, cand.checkpoint, base, shadow, cfg,
                                              ws.root / PLANS_DIR))
    return judge_row(ws, cfg, row)
