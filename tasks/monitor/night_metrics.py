"""One night's drift metrics as one flat row of the metrics time series (``schemas.NIGHTLY_METRICS``).

Pure and deterministic for a given input: no I/O and no Prefect. :func:`compute_night_metrics` builds
the row from named parts (selection skew, segments, probe errors and reference users, prediction shift,
volumes, held-out errors), each giving its columns and its share of ``detail_json`` (the histograms and
tables the report draws). Units as in ``distributions``: stars, bits, shares in [0, 1], counts.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from tasks.config import ScaleConfig
from tasks.evaluate.evaluation import MODELS, Evaluation
from tasks.evaluate.segments import SEGMENTS, RatingsByUser, check_window, segment_of
from tasks.monitor.distributions import (
    histogram,
    js_divergence,
    population_stability_index,
    prediction_bin_edges,
    profile_movement,
    rating_bin_edges,
    skew_summary,
)
from tasks.schemas import NIGHTLY_METRICS

#: Users shown in the "most skewed" list need at least this many probe ratings (one probe is too noisy).
MOST_SKEWED_MIN_PROBES = 2
MOST_SKEWED_SHOWN = 5

#: One part of the row: its columns, and its keys of ``detail_json``.
Part = tuple[dict, dict]


def jsonable(obj: object) -> object:
    """Recursively turn numpy scalars/arrays into Python values and NaN/inf into None (strict JSON)."""
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray, pd.Series)):
        return [jsonable(v) for v in list(obj)]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    return obj


def _float(x: object) -> float:
    try:
        f = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan
    return f


def _int(x: object) -> int | None:
    if x is None:
        return None
    f = _float(x)
    return None if math.isnan(f) else int(f)


def _ratio(num: object, den: object) -> float:
    n, d = _float(num), _float(den)
    return n / d if d and d > 0 and not math.isnan(n) else math.nan


def _quantile(values: np.ndarray, q: float) -> float:
    return float(np.quantile(values, q)) if values.size else math.nan


def _mean(values: np.ndarray) -> float:
    return float(values.mean()) if values.size else math.nan


def _dates_equal(dt: pd.Series, run_date: str) -> np.ndarray:
    """Boolean mask of rows whose ``dt`` is ``run_date``; accepts strings, categoricals (pyarrow's
    hive partition column) and datetimes."""
    if pd.api.types.is_datetime64_any_dtype(dt):
        dt = dt.dt.strftime("%Y-%m-%d")
    elif dt.dtype == object:
        dt = dt.astype(str)
    return (dt == run_date).to_numpy(dtype=bool)


def selection_skew(r: RatingsByUser, is_tonight: np.ndarray, scale: ScaleConfig) -> Part:
    """Tonight's organic ratings against every probe rating of the window (the watched numbers, with
    their night-to-night standard errors), and the whole window's organic against probe ratings."""
    org_tonight = r.is_organic & is_tonight
    probe_tonight = r.is_probe & is_tonight
    tonight = skew_summary(r.rating[org_tonight], r.rating[r.is_probe], scale, organic_users=r.codes[org_tonight],
                           new_probe=r.rating[probe_tonight], new_probe_users=r.codes[probe_tonight])
    whole = skew_summary(r.rating[r.is_organic], r.rating[r.is_probe], scale)
    columns = {
        "skew_organic_n": tonight["organic_n"], "skew_probe_n": tonight["probe_n"],
        "skew_organic_mean": tonight["organic_mean"], "skew_probe_mean": tonight["probe_mean"],
        "skew_mean_shift": tonight["mean_shift"], "skew_js": tonight["js"], "skew_w1": tonight["w1"],
        "skew_mean_shift_se": tonight["mean_shift_se"], "skew_js_se": tonight["js_se"],
        "skew_w1_se": tonight["w1_se"],
        "skew_test": tonight["test"], "skew_stat": tonight["stat"], "skew_pvalue": tonight["pvalue"],
        "window_organic_n": whole["organic_n"], "window_probe_n": whole["probe_n"],
        "window_organic_mean": whole["organic_mean"],
        "window_mean_shift": whole["mean_shift"], "window_js": whole["js"], "window_w1": whole["w1"],
        "window_pvalue": whole["pvalue"],
    }
    detail = {"rating_edges": rating_bin_edges(scale), "levels": list(scale.levels) if scale.step > 0 else None,
              "hist_tonight_organic": tonight["hist_organic"], "hist_window_probe": tonight["hist_probe"],
              "hist_window_organic": whole["hist_organic"]}
    return columns, detail


def user_segments(r: RatingsByUser, per_user: pd.DataFrame, skew_margin: float, scale: ScaleConfig) -> Part:
    """Per-user skew over the window: shares of users per segment, and each segment's organic against
    probe ratings (``segments.segment_of`` with ``skew_margin`` stars)."""
    seg = segment_of(per_user["skew"], skew_margin)
    both = per_user["skew"].dropna()
    n_both = int(both.size)
    shares = {s: (float(np.sum(seg == s)) / n_both if n_both else math.nan) for s in ("up", "down", "neutral")}
    segments: dict[str, dict] = {}
    seg_code = np.select([seg == name for name in SEGMENTS], list(range(len(SEGMENTS))))
    seg_by_row = seg_code[r.codes]
    for code, name in enumerate(SEGMENTS):
        in_seg = seg_by_row == code
        s = skew_summary(r.rating[r.is_organic & in_seg], r.rating[r.is_probe & in_seg], scale)
        segments[name] = {"users": int(np.sum(seg_code == code)),
                          **{k: s[k] for k in ("organic_n", "probe_n", "organic_mean", "probe_mean",
                                               "mean_shift", "js", "w1", "pvalue")}}
    columns = {"users_with_both": n_both, "users_unknown": int(np.sum(seg == "unknown")),
               "user_skew_mean": float(both.mean()) if n_both else math.nan,
               "user_skew_median": float(both.median()) if n_both else math.nan,
               "share_up": shares["up"], "share_down": shares["down"], "share_neutral": shares["neutral"]}
    return columns, {"segments": segments, "skew_margin": skew_margin}


def most_skewed_users(per_user: pd.DataFrame) -> list[dict]:
    """The users farthest from their probe ratings (at least :data:`MOST_SKEWED_MIN_PROBES` probes),
    largest absolute skew first, at most :data:`MOST_SKEWED_SHOWN`."""
    eligible = per_user[(per_user["probe_n"] >= MOST_SKEWED_MIN_PROBES) & per_user["skew"].notna()]
    order = eligible.assign(_abs=eligible["skew"].abs()).sort_values(["_abs"], ascending=False, kind="stable")
    return [{"user_id": str(uid), "organic_n": int(r["organic_n"]), "probe_n": int(r["probe_n"]),
             "organic_mean": float(r["organic_mean"]), "probe_mean": float(r["probe_mean"]),
             "skew": float(r["skew"])} for uid, r in order.head(MOST_SKEWED_SHOWN).iterrows()]


def probe_errors_and_references(probe_errors: pd.Series | None, reference_shares: Sequence[float] | None) -> Part:
    """Spread of the users' probe errors (stars) and the share of reference users per training round."""
    pe = np.asarray(probe_errors.dropna() if probe_errors is not None else [], dtype=float)
    ref = np.asarray(list(reference_shares or []), dtype=float)
    columns = {"probe_error_users": int(pe.size), "probe_error_mean": _mean(pe),
               "probe_error_median": _quantile(pe, 0.5), "probe_error_p90": _quantile(pe, 0.9),
               "reference_rounds": int(ref.size), "reference_share_mean": _mean(ref)}
    detail = {"probe_error_quantiles": {f"p{int(q * 100)}": _quantile(pe, q) for q in (0.1, 0.25, 0.5, 0.75, 0.9)},
              "reference_shares": ref}
    return columns, detail


def prediction_shift(scale: ScaleConfig, pred_candidate: np.ndarray | None, pred_live: np.ndarray | None,
                     profiles_candidate: np.ndarray | None, profiles_live: np.ndarray | None) -> Part:
    """Candidate against live: predicted-rating histograms (PSI, JS) on one sample of pairs, and how far
    each sampled user's rating profile moved."""
    pred_edges = prediction_bin_edges(scale)
    pc = None if pred_candidate is None else np.asarray(pred_candidate, dtype=float)
    pl = None if pred_live is None else np.asarray(pred_live, dtype=float)
    if pc is not None and pl is not None and pc.shape != pl.shape:
        raise ValueError(f"pred_candidate {pc.shape} and pred_live {pl.shape} must cover the same pairs")
    h_pc = histogram(pc, pred_edges) if pc is not None else None
    h_pl = histogram(pl, pred_edges) if pl is not None else None
    both_preds = h_pc is not None and h_pl is not None
    move = (profile_movement(profiles_candidate, profiles_live)
            if profiles_candidate is not None and profiles_live is not None else np.zeros(0))
    move = move[~np.isnan(move)]
    columns = {
        "pred_pairs": int(pc.size) if pc is not None else 0,
        "pred_candidate_mean": float(np.nanmean(pc)) if pc is not None and pc.size else math.nan,
        "pred_live_mean": float(np.nanmean(pl)) if pl is not None and pl.size else math.nan,
        "pred_psi": population_stability_index(h_pc, h_pl) if both_preds else math.nan,
        "pred_js": js_divergence(h_pc, h_pl) if both_preds else math.nan,
        "profile_users": int(move.size), "profile_move_mean": _mean(move), "profile_move_p90": _quantile(move, 0.9),
    }
    return columns, {"pred_edges": pred_edges, "pred_hist_candidate": h_pc, "pred_hist_live": h_pl}


def night_volumes(volumes: Mapping, r: RatingsByUser, is_tonight: np.ndarray) -> Part:
    """Rows read, stored and quarantined, new ids, and tonight's active and probe users (counted from
    tonight's rows unless ``volumes`` supplies them)."""
    active = volumes.get("active_users", np.unique(r.codes[is_tonight]).size)
    probers = volumes.get("probe_users", np.unique(r.codes[is_tonight & r.is_probe]).size)
    columns = {
        "rows_read": _int(volumes.get("rows_read")), "rows_ingested": _int(volumes.get("rows_ingested")),
        "rows_quarantined": _int(volumes.get("rows_quarantined")),
        "quarantine_share": _ratio(volumes.get("rows_quarantined"), volumes.get("rows_read")),
        "new_users": _int(volumes.get("new_users")), "new_items": _int(volumes.get("new_items")),
        "active_users": _int(active), "probe_users": _int(probers),
        "probe_coverage": _ratio(probers, active),
    }
    return columns, {"quarantined_by_reason": dict(sorted((volumes.get("quarantined_by_reason") or {}).items()))}


def model_errors(evaluation: Evaluation | None) -> Part:
    """Held-out probe errors per model (``<model>_mae`` ... ``<model>_n``; NaN/None for an absent model),
    the anchor comparison (``anchor_*``; NaN/None without an anchor), and the per-segment errors for the
    report."""
    columns: dict = {}
    segments: dict[str, object] = {}
    for name in MODELS:
        e = getattr(evaluation, name) if evaluation is not None else None
        for stat in ("mae", "mae_lo", "mae_hi", "rmse", "rmse_lo", "rmse_hi"):
            columns[f"{name}_{stat}"] = _float(getattr(e, stat)) if e is not None else math.nan
        columns[f"{name}_n"] = _int(e.n) if e is not None else None
        if e is not None and e.segments:
            segments[name] = {label: s.to_dict() for label, s in e.segments.items()}
    a = evaluation.anchor if evaluation is not None else None
    columns.update({"anchor_version": a.version_id if a else None, "anchor_n": _int(a.n) if a else None,
                    "anchor_mae": _float(a.mae) if a else math.nan,
                    "anchor_candidate_mae": _float(a.candidate_mae) if a else math.nan,
                    "anchor_live_mae": _float(a.live_mae) if a else math.nan,
                    "anchor_margin": _float(a.margin) if a else math.nan})
    return columns, {"evaluation_segments": segments,
                     "anchor": {"run_date": a.run_date, "is_live": a.is_live, "compared": a.compared,
                                "skipped": list(a.skipped)} if a else None}


def compute_night_metrics(
    run_date: str,
    window: pd.DataFrame,
    scale: ScaleConfig,
    skew_margin: float,
    *,
    probe_errors: pd.Series | None = None,
    reference_shares: Sequence[float] | None = None,
    pred_candidate: np.ndarray | None = None,
    pred_live: np.ndarray | None = None,
    profiles_candidate: np.ndarray | None = None,
    profiles_live: np.ndarray | None = None,
    evaluation: Evaluation | None = None,
    volumes: Mapping | None = None,
    versions: Mapping[str, str | None] | None = None,
) -> dict:
    """One night's drift metrics as one flat row (keys = columns of ``schemas.NIGHTLY_METRICS``).

    Inputs:
    - ``window``: validated ratings of the training window (user_id, item_id, rating in stars,
      source "organic"/"probe", dt YYYY-MM-DD); tonight = rows with ``dt == run_date``.
    - ``scale``: ``cfg.scale``; ``skew_margin``: ``cfg.evaluate.skew_margin`` (stars).
    - ``probe_errors``: per-user probe error (index user_id, stars); ``reference_shares``: share of
      users drawn as reference users, one per training round.
    - ``pred_candidate`` / ``pred_live``: predicted ratings (stars) on one common sample of pairs,
      shape ``(pairs,)``; live is None before the first promotion.
    - ``profiles_candidate`` / ``profiles_live``: ``users x K`` soft-CDF rating profiles, same user order.
    - ``evaluation``: the night's held-out errors (``evaluate.evaluation.Evaluation``), or None.
    - ``volumes``: rows_read, rows_ingested, rows_quarantined, quarantined_by_reason, new_users,
      new_items, active_users, probe_users (active/probe users default to counts from tonight's rows).
    - ``versions``: ``{"candidate": id, "live": id}`` for the report; any further keys (e.g. the
      candidate's "state" and the "gate" reason) are kept in ``detail_json`` and shown there.

    Selection skew "tonight" compares tonight's organic ratings with every probe rating in the
    window: probes are few per night (a few percent of active members), so a nightly probe sample is
    too noisy to show a shift, while the window's probes are a steady MAR reference and tonight's
    organic ratings react the same night members start choosing differently.
    """
    check_window(window)
    versions = dict(versions or {})
    r = RatingsByUser.of(window)
    is_tonight = _dates_equal(window["dt"], run_date)
    per_user = r.per_user()
    parts = [selection_skew(r, is_tonight, scale), user_segments(r, per_user, skew_margin, scale),
             probe_errors_and_references(probe_errors, reference_shares),
             prediction_shift(scale, pred_candidate, pred_live, profiles_candidate, profiles_live),
             night_volumes(dict(volumes or {}), r, is_tonight), model_errors(evaluation)]
    row: dict = {"run_date": run_date, "candidate_version": versions.get("candidate"),
                 "live_version": versions.get("live")}
    detail: dict = {"most_skewed_users": most_skewed_users(per_user),
                    "versions": {str(k): (None if v is None else str(v)) for k, v in sorted(versions.items())}}
    for columns, more in parts:
        row.update(columns)
        detail.update(more)
    row["detail_json"] = json.dumps(jsonable(detail), sort_keys=True, allow_nan=False)

    unknown = set(row) - set(NIGHTLY_METRICS.names)
    assert not unknown, f"metric keys missing from schemas.NIGHTLY_METRICS: {sorted(unknown)}"
    return row


def with_versions(row: Mapping, more: Mapping[str, str | None]) -> dict:
    """``row`` with ``more`` added to its versions in ``detail_json`` (what is known only after the gate:
    the candidate's ``state`` and the ``gate`` reason); the same row :func:`compute_night_metrics` gives
    when handed them in ``versions``."""
    detail = json.loads(row["detail_json"])
    detail["versions"] = {**detail.get("versions", {}), **{str(k): (None if v is None else str(v))
                                                          for k, v in more.items()}}
    detail["versions"] = dict(sorted(detail["versions"].items()))
    return {**row, "detail_json": json.dumps(jsonable(detail), sort_keys=True, allow_nan=False)}
