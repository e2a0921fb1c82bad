"""The nightly drift report: one self-contained HTML page and its JSON twin per night.

A report is a pure rendering of what it is given: tonight's stored metrics row, the stored series and
the alert history (:func:`build_report`, :func:`render_html`); :func:`write_report` writes the two files.
The nightly monitor pass hands in what it has just stored; :func:`render_report` loads the same pieces
from the workspace, so ``tarewise report --date D`` can redo any night and gets the same page.

The page carries no scripts, fonts, stylesheets or images from elsewhere: CSS is inline, charts are
matplotlib SVGs embedded as ``data:`` URIs (``report_charts``), text uses the reader's system fonts, and
every value that comes from data (ids, reasons, explanations) goes through jinja2's autoescape. Output
is deterministic for the same stored inputs (no timestamps, fixed SVG id salt, no SVG metadata).

It reads on a phone as on a desktop: a table wider than the screen scrolls in its own box, numbers
never wrap, and each chart is drawn at two widths (the phone's below 600 px). The words for people,
things and the rating unit come from ``[labels]`` (``cfg.labels``); each alert card shows the alert's
advice (``alert_advice``): what to check, which command shows more, when it clears.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from types import SimpleNamespace

import jinja2
import pandas as pd
from markupsafe import Markup, escape

from tasks.config import Config, LabelsConfig
from tasks.evaluate.evaluation import MODELS
from tasks.evaluate.segments import SEGMENTS
from tasks.files import atomic_write_bytes
from tasks.monitor.alert_advice import advice
from tasks.monitor.alert_history import FINAL, night_alerts, read_history
from tasks.monitor.alert_rules import KIND_SKEW, WITHDRAWN, metric_band
from tasks.monitor.metrics_store import read_metrics, row_of
from tasks.monitor.night_metrics import jsonable
from tasks.monitor.probe_budget_view import CAUTIONS, chart_probe_budget
from tasks.monitor.report_charts import (
    both_widths,
    chart_anchor_trend,
    chart_mae_trend,
    chart_prediction_shift,
    chart_rating_histograms,
    chart_skew_trend,
)
from tasks.workspace import Workspace

REPORT_FORMAT = "tarewise-night-report/1"
#: Nights shown in trend charts.
TREND_NIGHTS = 60
TEMPLATES = Path(__file__).parent / "templates"


# --------------------------------------------------------------------------------------------------
# Small value helpers
# --------------------------------------------------------------------------------------------------

def _num(x: object) -> float | None:
    if x is None or isinstance(x, (bool, jinja2.Undefined)):
        return None
    try:
        f = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def fmt(x: object, digits: int = 2, signed: bool = False, unit: str = "") -> str:
    """Number for display; an em dash when missing."""
    f = _num(x)
    if f is None:
        return "\u2014"
    s = f"{f:+.{digits}f}" if signed else f"{f:.{digits}f}"
    return f"{s} {unit}".rstrip()


def pvalue(x: object) -> str:
    """A p-value with four decimals; below 1e-4 as ``< 1e-4`` (four zeros would read as "impossible")."""
    f = _num(x)
    if f is None:
        return "\u2014"
    return "< 1e-4" if f < 1e-4 else f"{f:.4f}"


_CODE = re.compile(r"`([^`]+)`")


def code_spans(text: object) -> Markup:
    """Text with each `backticked` part (a command) set as ``<code>``; everything is escaped."""
    parts = _CODE.split(str(text))
    return Markup("").join(Markup("<code>{}</code>").format(p) if i % 2 else escape(p) for i, p in enumerate(parts))


def pct(x: object, digits: int = 1) -> str:
    f = _num(x)
    return "\u2014" if f is None else f"{100 * f:.{digits}f}%"


def count(x: object) -> str:
    f = _num(x)
    return "\u2014" if f is None else f"{int(round(f)):,}"


def _detail(row: Mapping) -> dict:
    raw = row.get("detail_json")
    if not raw or not isinstance(raw, str):
        return {}
    try:
        d = json.loads(raw)
    except json.JSONDecodeError:
        return {}
    return d if isinstance(d, dict) else {}


def _trend_frame(series: pd.DataFrame, run_date: str, cfg: Config, alert_dates: set[str]) -> pd.DataFrame:
    """Per night up to ``run_date``: mean shift, its band (as the rule saw it), alert flag, MAEs."""
    upto = series[series["run_date"] <= run_date].sort_values("run_date").reset_index(drop=True)
    rows = []
    start = max(0, len(upto) - TREND_NIGHTS)
    for i in range(start, len(upto)):
        r = upto.iloc[i].to_dict()
        band = metric_band("skew_mean_shift", r, upto.iloc[:i], cfg)
        rows.append({
            "run_date": r["run_date"], "skew_mean_shift": _num(r.get("skew_mean_shift")),
            "band_lo": band.lo if band else None, "band_hi": band.hi if band else None,
            "band_median": band.median if band else None, "skew_alert": r["run_date"] in alert_dates,
            **{f"{m}_{s}": _num(r.get(f"{m}_{s}")) for m in MODELS for s in ("mae", "mae_lo", "mae_hi")},
            "pred_psi": _num(r.get("pred_psi")), "probe_coverage": _num(r.get("probe_coverage")),
            **{k: _num(r.get(k)) for k in ("anchor_mae", "anchor_candidate_mae", "anchor_live_mae", "anchor_margin")},
            "anchor_version": r.get("anchor_version"),
        })
    return pd.DataFrame(rows)


# --------------------------------------------------------------------------------------------------
# Report content
# --------------------------------------------------------------------------------------------------

def _delivery_text(rec: Mapping) -> str:
    d = rec.get("delivery") or {}
    if rec.get("phase") != FINAL:
        return "delivery pending (the run stopped before delivery finished)"
    parts = []
    for key in ("event", "webhook"):
        out = d.get(key) or {}
        if out:
            parts.append(f"{key}: {out.get('outcome')}" + (f" ({out['error']})" if out.get("error") else ""))
    for name, out in (d.get("blocks") or {}).items():
        parts.append(f"{name}: {(out or {}).get('outcome')}")
    return "; ".join(parts) or "not delivered"


def _alert_view(rec: Mapping) -> dict:
    """One alert card: what moved (explanation, value, band) and what to do (advice: check, more, clears)."""
    band = rec.get("band") or [None, None]
    lo, hi = (band + [None, None])[:2]
    unit = "bits" if rec.get("metric") == "skew_js" else ""
    return {
        "alert_id": rec.get("alert_id", ""), "kind": rec.get("kind", ""), "severity": rec.get("severity", ""),
        "metric": rec.get("metric", ""), "value": fmt(rec.get("value"), 3, unit=unit),
        "band": f"{fmt(lo, 3)} \u2026 {fmt(hi, 3)}", "explanation": rec.get("explanation", ""),
        "status": rec.get("status", ""), "count": rec.get("count", 1), "first_date": rec.get("first_date", ""),
        "last_date": rec.get("last_date", ""), "also": ", ".join(rec.get("also") or []),
        "delivery": _delivery_text(rec), "advice": rec.get("advice") or {},
    }


def build_report(run_date: str, cfg: Config, row: Mapping, series: pd.DataFrame, history: Sequence[Mapping]) -> dict:
    """Everything the page shows, as plain data (the JSON twin plus chart data URIs under ``charts``).

    ``row``: the night's stored metrics row (``metrics_store.row_of``); ``series``: the stored series
    (nights after ``run_date`` are ignored); ``history``: every alert history record, in file order.
    """
    # Records written before alerts carried advice get it from their kind, in today's words.
    alerts = [a if a.get("advice") else {**a, "advice": advice(str(a.get("kind")), str(a.get("severity")),
                                                                run_date, cfg)}
              for a in night_alerts(history, run_date)]
    withdrawn = {(r.get("alert_id"), r.get("run_date")) for r in history if r.get("phase") == WITHDRAWN}
    skew_dates = {str(r.get("run_date")) for r in history if r.get("kind") == KIND_SKEW
                  and (r.get("alert_id"), r.get("run_date")) not in withdrawn}
    detail = _detail(row)
    trend = _trend_frame(series, run_date, cfg, skew_dates)
    unit = cfg.labels.rating_unit
    clean_row = {k: v for k, v in jsonable(row).items() if k != "detail_json"}
    return {
        "format": REPORT_FORMAT,
        "run_date": run_date,
        "metrics": clean_row,
        "detail": jsonable(detail),
        "alerts": jsonable(alerts),
        "trend": jsonable(trend.to_dict(orient="records")),
        "charts": {
            "rating_histograms": both_widths(chart_rating_histograms, detail, unit),
            "skew_trend": both_widths(chart_skew_trend, trend, unit),
            "prediction_shift": both_widths(chart_prediction_shift, detail, unit),
            "mae_trend": both_widths(chart_mae_trend, trend, unit),
            "anchor_trend": both_widths(chart_anchor_trend, trend, unit, cfg.gate.anchor_budget),
            "probe_budget": both_widths(chart_probe_budget, detail, unit),
        },
        "settings": {"baseline_nights": cfg.drift.baseline_nights, "mad_k": cfg.drift.mad_k,
                     "min_baseline_nights": cfg.drift.min_baseline_nights,
                     "skew_margin": cfg.evaluate.skew_margin, "confidence": cfg.evaluate.confidence,
                     "anchor_budget": cfg.gate.anchor_budget, "anchor_nights": cfg.gate.anchor_nights,
                     "scale": [cfg.scale.min, cfg.scale.max, cfg.scale.step],
                     "labels": {**cfg.labels.model_dump(), "unit_short": cfg.labels.unit_short}},
    }


def _environment() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES)), autoescape=True,
                             undefined=jinja2.ChainableUndefined, trim_blocks=True, lstrip_blocks=True)
    env.filters.update(fmt=fmt, pct=pct, count=count, pvalue=pvalue, code_spans=code_spans)
    return env


def render_html(report: Mapping) -> str:
    """The page for one :func:`build_report` result."""
    m = report["metrics"]
    d = report["detail"]
    severities = [a.get("severity") for a in report["alerts"]]
    verdict = ("quiet night: no alerts" if not severities else
               f"{len(severities)} alert{'s' if len(severities) != 1 else ''} "
               f"({', '.join(f'{severities.count(s)} {s}' for s in ('critical', 'warning', 'info') if s in severities)})")
    eval_segments = d.get("evaluation_segments") or {}
    # A segment column no model has a number for (e.g. "unknown": no probe ratings) is left out.
    eval_columns = [seg for seg in SEGMENTS if any(
        _num(((segs or {}).get(seg) or {}).get("mae")) is not None for segs in eval_segments.values())]
    template = _environment().get_template("report.html.j2")
    return template.render(
        r=report, m=m, d=d, verdict=verdict, worst=("critical" if "critical" in severities else
                                                    "warning" if severities else "calm"),
        alerts=[_alert_view(a) for a in report["alerts"]],
        segments=[(name, (d.get("segments") or {}).get(name) or {}) for name in SEGMENTS],
        models=[(mdl, {s: m.get(f"{mdl}_{s}") for s in ("mae", "mae_lo", "mae_hi", "rmse", "rmse_lo", "rmse_hi", "n")})
                for mdl in MODELS],
        eval_segments=eval_segments, eval_columns=eval_columns,
        # Under methods without reference users (the default per_user) every share is missing: no table.
        reference_shares=d.get("reference_shares") or [],
        show_reference=any(_num(x) is not None for x in d.get("reference_shares") or []),
        # Attributes, not a dict: a label named like a dict method ("items") must stay the label.
        L=SimpleNamespace(**report["settings"]["labels"]),
        budget=d.get("probe_budget") or {}, probe_cautions=CAUTIONS,
    )


def write_report(ws: Workspace, run_date: str, cfg: Config, row: Mapping, series: pd.DataFrame,
                 history: Sequence[Mapping]) -> tuple[Path, Path]:
    """Write ``ws.reports/<run_date>.html`` and ``.json`` for the given pieces (see :func:`build_report`)."""
    report = build_report(run_date, cfg, row, series, history)
    html = render_html(report)
    twin = {k: v for k, v in report.items() if k != "charts"}
    html_path = ws.reports / f"{run_date}.html"
    json_path = ws.reports / f"{run_date}.json"
    atomic_write_bytes(html_path, html.encode("utf-8"))
    atomic_write_bytes(json_path, (json.dumps(twin, indent=2, sort_keys=True, allow_nan=False) + "\n").encode("utf-8"))
    return html_path, json_path


def render_report(ws: Workspace, run_date: str, cfg: Config) -> tuple[Path, Path]:
    """Re-render a night's report from what is stored: the metrics series and the alert history, each
    read once (``tarewise report --date``)."""
    series = read_metrics(ws)
    return write_report(ws, run_date, cfg, row_of(series, run_date, ws.metrics), series, read_history(ws))


# --------------------------------------------------------------------------------------------------
# Prefect artifact helpers (plain data; the flow creates the artifacts)
# --------------------------------------------------------------------------------------------------

_MD_SPECIAL = re.compile(r"([\\`*_{}\[\]()#+\-.!|<>&])")


def _md(text: object) -> str:
    """Escape text for Markdown (and any HTML the renderer would pass through)."""
    return _MD_SPECIAL.sub(r"\\\1", str(text)).replace("\n", " ")


def summary_table(row: Mapping, alerts: Sequence[Mapping], labels: LabelsConfig = LabelsConfig()) -> list[dict]:
    """Key numbers of the night as ``[{"metric", "value"}]`` rows (for a Prefect table artifact), in the
    words of ``labels``."""
    unit, users = labels.rating_unit, labels.users
    rows = [
        ("night", str(row.get("run_date"))),
        ("alerts", str(len(alerts)) + (" (" + ", ".join(sorted({str(a.get('kind')) for a in alerts})) + ")"
                                      if alerts else "")),
        ("selection skew tonight: organic \u2212 probe mean", fmt(row.get("skew_mean_shift"), 3, True, unit)),
        ("selection skew tonight: Jensen-Shannon", fmt(row.get("skew_js"), 4, unit="bits")),
        ("selection skew tonight: Wasserstein-1", fmt(row.get("skew_w1"), 3, unit=unit)),
        (f"{users} skewed up / down / neutral",
         f"{pct(row.get('share_up'))} / {pct(row.get('share_down'))} / {pct(row.get('share_neutral'))}"),
        ("candidate MAE (held-out probes)", _mae_text(row, "candidate")),
        ("shadow MAE", _mae_text(row, "shadow")),
        ("live MAE", _mae_text(row, "live")),
        ("prediction shift PSI (candidate vs live)", fmt(row.get("pred_psi"), 4)),
        ("rows ingested / quarantined", f"{count(row.get('rows_ingested'))} / {count(row.get('rows_quarantined'))}"),
        (f"probe coverage of active {users}", pct(row.get("probe_coverage"), 2)),
    ]
    return [{"metric": k, "value": v} for k, v in rows]


def _mae_text(row: Mapping, model: str) -> str:
    if _num(row.get(f"{model}_mae")) is None:
        return "\u2014"
    return (f"{fmt(row.get(f'{model}_mae'), 3)} [{fmt(row.get(f'{model}_mae_lo'), 3)}, "
            f"{fmt(row.get(f'{model}_mae_hi'), 3)}]")


def summary_markdown(row: Mapping, alerts: Sequence[Mapping], labels: LabelsConfig = LabelsConfig()) -> str:
    """A short Markdown summary of the night (for a Prefect markdown artifact); data is escaped."""
    lines = [f"# tarewise night {_md(row.get('run_date'))}", ""]
    if alerts:
        lines.append(f"**{len(alerts)} alert(s)**")
        lines.append("")
        for a in alerts:
            lines.append(f"- **{_md(a.get('severity'))}** {_md(a.get('kind'))}"
                         f" (night {_md(a.get('count', 1))} of this episode): {_md(a.get('explanation'))}")
    else:
        lines.append("Quiet night: no alerts.")
    lines += ["", "| metric | value |", "| --- | --- |"]
    lines += [f"| {_md(r['metric'])} | {_md(r['value'])} |" for r in summary_table(row, alerts, labels)]
    return "\n".join(lines) + "\n"
