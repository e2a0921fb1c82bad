"""The report's probe budget: tonight's budget curve (``tasks/evaluate/probe_budget.py``) kept in the
night's ``detail_json`` under ``probe_budget``, and its chart (drawn at both widths like every chart).

The curve is measured before the gate from the night's held-out probe ratings, so ``tarewise report``
re-renders it from storage like the rest of the page.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from tasks.config import Config
from tasks.engine.checkpoint import Checkpoint
from tasks.evaluate.probe_budget import budget_from_window
from tasks.monitor.night_metrics import jsonable
from tasks.monitor.report_charts import COLOURS, _charting, _figure, _style, _svg_data_uri

#: Cautions shown beside the curve (README says the same).
CAUTIONS = (
    "Every probe rating asks a real person to rate something they did not choose.",
    "Respect consent and opt-outs: an opted-out person is never asked.",
    "Do not concentrate the probe on any group of people; the uniform share of every plan keeps the "
    "whole population in view.",
    "The curve and any probe plan are advice; the operator's policy decides who is asked and how often.",
)


def night_budget(window: pd.DataFrame, run_date: str, candidate: Checkpoint, live: Checkpoint | None,
                 shadow: Checkpoint | None, cfg: Config, plans: Path | None = None) -> dict | None:
    """Tonight's budget as plain data (``Budget.to_dict()``), compared with live (else the shadow model);
    None when the night has too few probe ratings for one."""
    baseline, name = (live, "live") if live is not None else (shadow, "shadow")
    try:
        return jsonable(budget_from_window(window, run_date, candidate, baseline, name, cfg, plans).to_dict())
    except ValueError:
        return None


def with_probe_budget(row: Mapping, budget: Mapping | None) -> dict:
    """``row`` with ``budget`` stored in its ``detail_json`` under ``probe_budget`` (unchanged when None)."""
    if budget is None:
        return dict(row)
    detail = json.loads(row["detail_json"])
    detail["probe_budget"] = jsonable(budget)
    return {**row, "detail_json": json.dumps(detail, sort_keys=True, allow_nan=False)}


@_charting
def chart_probe_budget(detail: Mapping, unit: str, narrow: bool = False) -> str | None:
    """Probes per night against the held-out MAE interval's width and the regression the gate detects
    at the target power; resampled points solid, modelled ones dashed; today's count marked."""
    b = detail.get("probe_budget") or {}
    pts = b.get("points") or []
    if len(pts) < 2:
        return None
    x = np.array([p["probes_per_night"] for p in pts], float)
    width = np.array([np.nan if p.get("width") is None else p["width"] for p in pts], float)
    detect = np.array([np.nan if p.get("detectable") is None else p["detectable"] for p in pts], float)
    modelled = np.array([bool(p.get("modelled")) for p in pts])
    fig = _figure("narrow" if narrow else "trend")   # full page width, like the trends
    ax = fig.add_subplot()
    last = int(np.flatnonzero(~modelled)[-1]) if (~modelled).any() else 0
    target = b.get("power_target") or 0.8
    for y, key, label in ((width, "candidate", "held-out MAE interval width"),
                          (detect, "live", f"regression the gate detects {target:.0%} of the time")):
        ax.plot(x[:last + 1], y[:last + 1], color=COLOURS[key], marker="o", markersize=3, linewidth=1.4, label=label)
        if last + 1 < len(x):
            ax.plot(x[last:], y[last:], color=COLOURS[key], linestyle="--", marker="o", markersize=3,
                    markerfacecolor="none", linewidth=1.2)
    today = b.get("today")
    if today:
        ax.axvline(today, color=COLOURS["ink"], linewidth=0.9, linestyle=":")
        ax.annotate("today", (today, 1.0), xycoords=("data", "axes fraction"), ha="left", va="top",
                    xytext=(3, 0), textcoords="offset points", color=COLOURS["ink"])
    ax.set_xscale("log")
    ax.set_xticks(x[:: 2 if narrow else 1], [f"{v:g}" for v in x[:: 2 if narrow else 1]])
    ax.minorticks_off()
    ax.set_xlabel("probe ratings a night (dashed: modelled)")
    ax.set_ylabel(unit)
    ax.set_ylim(bottom=0)
    _style(ax)
    ax.legend(frameon=False, loc="lower left", bbox_to_anchor=(0, 1.0), ncols=1 if narrow else 2)
    return _svg_data_uri(fig)
