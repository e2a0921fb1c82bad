"""After publishing: tonight's drift metrics row, skew-shift alerts, and the HTML/JSON report.

Glue between the run's in-memory results and the pure metric/alert/report modules. Alert delivery never
raises (see ``alert_delivery``); a failure to render the report is logged by the flow, not fatal.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import torch

from tasks.config import Config
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.profiles import soft_cdf, thresholds
from tasks.ingest.logs import IngestResult, rejected_by_reason
from tasks.monitor.alert_delivery import raise_alerts
from tasks.monitor.metrics_store import write_night_metrics
from tasks.monitor.report import render_report, summary_markdown, summary_table
from tasks.monitor.skew_metrics import compute_night_metrics
from tasks.schemas import PROBE
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


def report_night(cfg: Config, ws: Workspace, run_date: str, window: pd.DataFrame, ingested: IngestResult,
                 night, evaluation: dict, decision, base: Checkpoint | None, base_id: str | None,
                 version_id: str, state: str, kind: str = "nightly") -> dict:
    """Write tonight's metrics row, raise alerts, render the report. Returns
    ``{"markdown", "table", "alerts" (one line each), "report" (html path)}``."""
    cand = night.candidate
    tonight = window[window["dt"].astype(str) == run_date]
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
        volumes=volumes, versions={"candidate": version_id, "live": base_id,
                                   "state": state, "gate": decision.reason},
        **sample)
    write_night_metrics(ws, row)
    records = raise_alerts(ws, run_date, cfg, kind=kind)
    html, _ = render_report(ws, run_date, cfg)
    return {"markdown": summary_markdown(row, records), "table": summary_table(row, records),
            "alerts": [f"{r.get('severity')}: {r.get('kind')} - {r.get('explanation', '')}" for r in records],
            "report": str(html)}
