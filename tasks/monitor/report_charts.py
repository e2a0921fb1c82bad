"""The report's charts: matplotlib SVGs embedded as ``data:`` URIs, deterministic for the same input.

Object API only (nothing global is touched): rc settings apply inside each chart call, the SVG id salt
is fixed and SVG metadata is dropped, so the same data gives the same bytes. Each chart returns None
when there is nothing to draw.

Every chart is drawn twice (:func:`both_widths`): ``wide`` for a desktop page and ``narrow`` for a
phone (a figure about as wide as a phone's screen, fewer date ticks, legends above the plot), so its
text stays about as large as the page's small print on either; the page picks one by screen width.
Text is :data:`FONT_PT` points at the figure's own size (:data:`SIZES`, inches).
"""

from __future__ import annotations

import base64
import functools
import io
import re
from collections.abc import Mapping, Sequence

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from tasks.evaluate.evaluation import MODELS

# Palette (our own): rust for organic ratings, deep teal for probe ratings and the candidate,
# warm grey for the shadow model, ochre for the live version, slate for the anchor, a dark berry for alerts.
COLOURS = {
    "organic": "#b4532a", "probe": "#1f6b70", "candidate": "#1f6b70", "shadow": "#8b8680",
    "live": "#c08a1e", "anchor": "#4a4f7c", "band": "#e9e2d3", "alert": "#8c1d40", "ink": "#2a2d31", "grid": "#dedad2",
}

#: Font size of every chart text (ticks, labels, legends), in points of the figure.
FONT_PT = 9
#: Figure sizes in inches (width, height): a small chart beside a table, a trend over nights, a phone's.
SIZES = {"small": (6.4, 2.9), "trend": (10.0, 3.3), "narrow": (4.2, 3.3)}

_SVG_RC = {"svg.hashsalt": "tarewise", "svg.fonttype": "path", "font.size": FONT_PT,
           "axes.edgecolor": COLOURS["grid"], "axes.labelcolor": COLOURS["ink"],
           "xtick.color": COLOURS["ink"], "ytick.color": COLOURS["ink"]}


def _charting(fn):
    """Run a chart function under our rc settings (fonts are read when artists are created)."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(_SVG_RC):
            return fn(*args, **kwargs)
    return wrapper


def _figure(size: str) -> Figure:
    return Figure(figsize=SIZES[size], dpi=100, layout="constrained")


def both_widths(chart, *args) -> dict[str, str] | None:
    """``{"wide": uri, "narrow": uri}`` of one chart function (called with ``*args`` and ``narrow``), or
    None when there is nothing to draw."""
    wide = chart(*args, narrow=False)
    return None if wide is None else {"wide": wide, "narrow": chart(*args, narrow=True)}


def _legend(ax, narrow: bool) -> None:
    """Inside the plot on a wide chart; above it, one entry a line, on a narrow one."""
    if narrow:
        ax.legend(frameon=False, loc="lower left", bbox_to_anchor=(0, 1.0), ncols=1)
    else:
        ax.legend(frameon=False, loc="upper left")


def _style(ax) -> None:
    ax.grid(True, axis="y", color=COLOURS["grid"], linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def _svg_data_uri(fig: Figure) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    svg = buf.getvalue().decode("utf-8")
    svg = re.sub(r"<metadata>.*?</metadata>", "", svg, flags=re.S)
    return "data:image/svg+xml;base64," + base64.b64encode(svg.encode("utf-8")).decode("ascii")


def _short_dates(dates: Sequence[str]) -> list[str]:
    return [d[5:] for d in dates]  # MM-DD keeps the axis readable


def _night_axis(ax, trend: pd.DataFrame, ylabel: str, narrow: bool) -> None:
    """A trend chart's finish: one position per night, about eight dates shown (four on a narrow
    chart), the legend above."""
    x = np.arange(len(trend))
    step = max(1, len(x) // (4 if narrow else 8))
    ax.set_xticks(x[::step], _short_dates(trend["run_date"].tolist())[::step])
    ax.set_ylabel(ylabel)
    ax.set_xlim(-0.6, len(x) - 0.4)
    _style(ax)
    ax.legend(frameon=False, loc="lower left", bbox_to_anchor=(0, 1.0), ncols=1 if narrow else 3)


@_charting
def chart_rating_histograms(detail: Mapping, unit: str, narrow: bool = False) -> str | None:
    """Organic (tonight) vs probe (window) rating shares per level; ``unit``: the rating unit's name."""
    org = np.asarray(detail.get("hist_tonight_organic") or [], dtype=float)
    probe = np.asarray(detail.get("hist_window_probe") or [], dtype=float)
    edges = np.asarray(detail.get("rating_edges") or [], dtype=float)
    if org.size == 0 or edges.size != org.size + 1 or (org.sum() == 0 and probe.sum() == 0):
        return None
    centres = (edges[:-1] + edges[1:]) / 2
    width = np.diff(edges).min() * 0.38
    fig = _figure("narrow" if narrow else "small")
    ax = fig.add_subplot()
    for shift, h, key, label in ((-width / 2, org, "organic", "organic ratings, tonight"),
                                 (width / 2, probe, "probe", "probe ratings, whole window")):
        share = h / h.sum() if h.sum() else h
        ax.bar(centres + shift, share, width=width, color=COLOURS[key], label=label)
    ax.set_xticks(centres, [f"{c:g}" for c in centres])
    ax.set_xlabel(f"rating ({unit})")
    ax.set_ylabel("share of ratings")
    _style(ax)
    _legend(ax, narrow)
    return _svg_data_uri(fig)


@_charting
def chart_skew_trend(trend: pd.DataFrame, unit: str, narrow: bool = False) -> str | None:
    """Mean shift per night with its trailing band and the nights that raised a skew alert."""
    if trend.empty or trend["skew_mean_shift"].isna().all():
        return None
    x = np.arange(len(trend))
    y = trend["skew_mean_shift"].astype(float).to_numpy()
    lo = trend["band_lo"].astype(float).to_numpy()
    hi = trend["band_hi"].astype(float).to_numpy()
    fig = _figure("narrow" if narrow else "trend")
    ax = fig.add_subplot()
    ax.fill_between(x, lo, hi, color=COLOURS["band"], step="mid", label="usual range (trailing band)",
                    where=~np.isnan(lo))
    ax.plot(x, y, color=COLOURS["ink"], linewidth=1.2, marker="o", markersize=3, label="organic \u2212 probe mean")
    hit = trend["skew_alert"].to_numpy(dtype=bool)
    if hit.any():
        ax.scatter(x[hit], y[hit], s=70, marker="D", facecolors="none", edgecolors=COLOURS["alert"],
                   linewidths=1.6, label="skew alert", zorder=3)
    ax.axhline(0, color=COLOURS["grid"], linewidth=0.8)
    _night_axis(ax, trend, f"organic − probe mean ({unit})", narrow)
    return _svg_data_uri(fig)


@_charting
def chart_prediction_shift(detail: Mapping, unit: str, narrow: bool = False) -> str | None:
    """Predicted-rating shares per bin: candidate vs live."""
    cand = detail.get("pred_hist_candidate")
    live = detail.get("pred_hist_live")
    edges = np.asarray(detail.get("pred_edges") or [], dtype=float)
    if not cand or edges.size != len(cand) + 1:
        return None
    centres = (edges[:-1] + edges[1:]) / 2
    width = np.diff(edges).min() * (0.4 if live else 0.8)
    fig = _figure("narrow" if narrow else "small")
    ax = fig.add_subplot()
    series = [("candidate", np.asarray(cand, float))] + ([("live", np.asarray(live, float))] if live else [])
    for j, (key, h) in enumerate(series):
        offset = (j - (len(series) - 1) / 2) * width
        ax.bar(centres + offset, h / h.sum() if h.sum() else h, width=width, color=COLOURS[key], label=key)
    ax.set_xlabel(f"predicted rating ({unit})")
    ax.set_ylabel("share of sampled pairs")
    _style(ax)
    _legend(ax, narrow)
    return _svg_data_uri(fig)


@_charting
def chart_mae_trend(trend: pd.DataFrame, unit: str, narrow: bool = False) -> str | None:
    """Held-out probe MAE per night for candidate, shadow and live, with confidence intervals."""
    if trend.empty or all(trend[f"{m}_mae"].isna().all() for m in MODELS):
        return None
    x = np.arange(len(trend))
    fig = _figure("narrow" if narrow else "trend")
    ax = fig.add_subplot()
    for m in MODELS:
        y = trend[f"{m}_mae"].astype(float).to_numpy()
        if np.isnan(y).all():
            continue
        lo = trend[f"{m}_mae_lo"].astype(float).to_numpy()
        hi = trend[f"{m}_mae_hi"].astype(float).to_numpy()
        ax.fill_between(x, lo, hi, color=COLOURS[m], alpha=0.14, linewidth=0)
        ax.plot(x, y, color=COLOURS[m], marker="o", markersize=3, linewidth=1.4, label=m)
    _night_axis(ax, trend, f"held-out probe MAE ({unit})", narrow)
    return _svg_data_uri(fig)



@_charting
def chart_anchor_trend(trend: pd.DataFrame, unit: str, budget: float, narrow: bool = False) -> str | None:
    """Per night, on the held-out ratings the anchor is scored on: the anchor's MAE, the candidate's and
    live's on the same rows, and the line the candidate may not cross (anchor + ``budget``)."""
    if trend.empty or "anchor_mae" not in trend or trend["anchor_mae"].isna().all():
        return None
    x = np.arange(len(trend))
    anchor = trend["anchor_mae"].astype(float).to_numpy()
    fig = _figure("narrow" if narrow else "trend")
    ax = fig.add_subplot()
    ax.fill_between(x, anchor, anchor + budget, color=COLOURS["band"], step="mid", where=~np.isnan(anchor),
                    label="anchor + budget (gate.anchor_budget)")
    ax.plot(x, anchor, color=COLOURS["anchor"], marker="s", markersize=3, linewidth=1.4, label="anchor")
    for key, col in (("live", "anchor_live_mae"), ("candidate", "anchor_candidate_mae")):
        y = trend[col].astype(float).to_numpy()
        if not np.isnan(y).all():
            ax.plot(x, y, color=COLOURS[key], marker="o", markersize=3, linewidth=1.4, label=key)
    _night_axis(ax, trend, f"held-out probe MAE ({unit})", narrow)
    return _svg_data_uri(fig)
