"""Small real versions for tests that need a workspace with published versions but no night.

:func:`publish_night` trains a tiny model with the engine (about a second), ranks its predictions and
publishes it through ``tasks.publish.versions`` exactly as the nightly flow's publish step does: real
checkpoint files, a real ``predictions.parquet``, a manifest with the fields the pipeline reads. Ids are
the invented demo's (``member-000123``); ``user_ids`` replaces them where a test needs other ids.
"""

from __future__ import annotations

import pandas as pd
from synthetic import mnar_logs

from tasks.config import Config
from tasks.engine.trainer import fit
from tasks.publish import versions
from tasks.publish.predictions import build_predictions
from tasks.train.settings import engine_settings
from tasks.workspace import Workspace

CFG = Config().updated({"model.max_epochs": 2, "model.batch_size": 64, "model.dim": 4})


def small_window(seed: int = 5, user_ids: list[str] | None = None) -> pd.DataFrame:
    """Organic and probe ratings (user_id, item_id, rating, source) of 30 members and 20 titles."""
    logs = mnar_logs(n_users=30, n_items=20, per_user=6, probe_users=20, seed=seed)
    window = pd.concat([logs.organic.assign(source="organic"), logs.probe.assign(source="probe")],
                       ignore_index=True)
    if user_ids is not None:
        rename = dict(zip(logs.user_ids, user_ids))
        window["user_id"] = window["user_id"].map(lambda u: rename.get(u, u))
    return window


def publish_night(ws: Workspace, run_date: str, live: bool = True, seed: int = 5,
                  user_ids: list[str] | None = None, gate: dict | None = None) -> str:
    """Train, publish and (``live``) switch to a version for ``run_date``, warm-started from the version
    the pipeline would choose (``versions.base_for_date``). ``gate``: the manifest's gate decision
    (default: promoted when ``live``). Returns the version id."""
    window = small_window(seed, user_ids)
    base_id = versions.base_for_date(ws, run_date)
    base = versions.load_checkpoint(ws, base_id) if base_id else None
    organic = window.loc[window["source"] == "organic", ["user_id", "item_id", "rating"]]
    probe = window.loc[window["source"] == "probe", ["user_id", "item_id", "rating"]]
    ckpt = fit(organic, probe, engine_settings(CFG), previous=base).checkpoint
    preds = build_predictions(ckpt, window, CFG.publish.top_n, CFG.debias.memory_budget_mb)
    vid = versions.new_version_id(ws, run_date)
    manifest = {"run_date": run_date, "kind": "nightly", "base_version": base_id, "method": ckpt.method,
                "metrics": {}, "gate": gate or {"promote": live, "reason": "test version"}}
    versions.publish(ws, vid, ckpt, preds, manifest, shadow=ckpt)
    if live:
        versions.set_live(ws, vid, reason=f"test night {run_date}")
    return vid
