"""The report's probe budget: measured from a night's real models, kept in detail_json, drawn at both widths."""

from __future__ import annotations

import json

from versions_kit import CFG, small_window

from tasks.engine.trainer import fit
from tasks.monitor.night_metrics import compute_night_metrics
from tasks.monitor.probe_budget_view import chart_probe_budget, night_budget, with_probe_budget
from tasks.monitor.report_charts import both_widths
from tasks.train.settings import engine_settings


def _night():
    window = small_window(seed=5).assign(dt="2026-11-02")
    organic = window.loc[window["source"] == "organic", ["user_id", "item_id", "rating"]]
    probe = window.loc[window["source"] == "probe", ["user_id", "item_id", "rating"]]
    live = fit(organic, probe, engine_settings(CFG)).checkpoint
    cand = fit(organic, probe, engine_settings(CFG.updated({"model.seed": 8}))).checkpoint
    return window, cand, live


def test_budget_is_measured_stored_and_drawn() -> None:
    window, cand, live = _night()
    budget = night_budget(window, "2026-11-02", cand, live, None, CFG)
    assert budget is not None and budget["paired_with"] == "live"
    assert budget["today"] == int((window["source"] == "probe").sum())
    json.dumps(budget, allow_nan=False)           # strict JSON: stored in detail_json as is
    row = compute_night_metrics("2026-11-02", window, CFG.scale, CFG.evaluate.skew_margin)
    stored = with_probe_budget(row, budget)
    detail = json.loads(stored["detail_json"])
    assert detail["probe_budget"]["sentence"] == budget["sentence"]
    assert json.loads(row["detail_json"]).keys() <= detail.keys()
    charts = both_widths(chart_probe_budget, detail, "stars")
    assert charts and all(uri.startswith("data:image/svg+xml;base64,") for uri in charts.values())
    assert charts["wide"] != charts["narrow"]


def test_without_a_live_model_the_shadow_is_the_baseline_and_without_probes_there_is_no_budget() -> None:
    window, cand, live = _night()
    assert night_budget(window, "2026-11-02", cand, None, live, CFG)["paired_with"] == "shadow"
    organic_only = window[window["source"] == "organic"]
    assert night_budget(organic_only, "2026-11-02", cand, live, None, CFG) is None
    row = compute_night_metrics("2026-11-02", window, CFG.scale, CFG.evaluate.skew_margin)
    assert with_probe_budget(row, None) == row
    assert chart_probe_budget(json.loads(row["detail_json"]), "stars") is None
