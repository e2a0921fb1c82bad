"""Data contracts: the one place that says what every table tarewise reads or writes looks like.

Readers and writers import these schemas instead of spelling columns out, so a change shows up here.
"""

from __future__ import annotations

import pyarrow as pa

#: `source` values after mapping the configured labels.
ORGANIC = "organic"
PROBE = "probe"

#: Canonical columns of a validated rating row (input columns renamed per ``input.columns``).
RATINGS = pa.schema([
    pa.field("user_id", pa.string(), nullable=False),
    pa.field("item_id", pa.string(), nullable=False),
    pa.field("rating", pa.float64(), nullable=False),
    pa.field("event_time", pa.timestamp("us", tz="UTC"), nullable=False),
    pa.field("source", pa.string(), nullable=False),   # ORGANIC or PROBE
])

#: Curated store: validated ratings plus lineage. Partitioned by ``dt`` (the run date) on disk.
STORE = pa.schema(list(RATINGS) + [
    pa.field("input_file", pa.string(), nullable=False),
    pa.field("input_row", pa.int64(), nullable=False),
])

#: Quarantine: the raw row rendered as strings (types may be what made it bad), plus why.
QUARANTINE = pa.schema([
    pa.field("run_date", pa.string(), nullable=False),
    pa.field("input_file", pa.string(), nullable=False),
    pa.field("input_row", pa.int64(), nullable=False),
    pa.field("reason", pa.string(), nullable=False),
    pa.field("user_id", pa.string()),
    pa.field("item_id", pa.string()),
    pa.field("rating", pa.string()),
    pa.field("event_time", pa.string()),
    pa.field("source", pa.string()),
])

#: Published predictions: top-N unrated items per user.
PREDICTIONS = pa.schema([
    pa.field("user_id", pa.string(), nullable=False),
    pa.field("item_id", pa.string(), nullable=False),
    pa.field("score", pa.float32(), nullable=False),   # predicted rating on the configured scale
    pa.field("rank", pa.int32(), nullable=False),      # 1 = best
])

#: Output of `tarewise score`: the input pairs plus score and a fallback flag.
SCORES = pa.schema([
    pa.field("user_id", pa.string(), nullable=False),
    pa.field("item_id", pa.string(), nullable=False),
    pa.field("score", pa.float32(), nullable=False),
    # "" when both ids are known; else "unknown_user", "unknown_item" or "unknown_both".
    pa.field("fallback", pa.string(), nullable=False),
])

#: Run ledger: one row per run attempt (nightly, backfill date, rollback).
LEDGER = pa.schema([
    pa.field("run_id", pa.string(), nullable=False),
    pa.field("kind", pa.string(), nullable=False),        # nightly | backfill | rollback | sweep
    pa.field("run_date", pa.string(), nullable=False),    # YYYY-MM-DD
    pa.field("status", pa.string(), nullable=False),      # running | done | failed | skipped | interrupted | refused
    pa.field("version_id", pa.string()),
    pa.field("state", pa.string()),                       # live | held | ""
    pa.field("rows_ingested", pa.int64()),
    pa.field("rows_quarantined", pa.int64()),
    pa.field("started_at", pa.timestamp("us", tz="UTC")),
    pa.field("finished_at", pa.timestamp("us", tz="UTC")),
    pa.field("durations_json", pa.string()),              # {"ingest": s, "train": s, ...}
    pa.field("message", pa.string()),
    pa.field("flow_run_id", pa.string()),                 # the Prefect flow run that ran it (None outside one)
    pa.field("inputs_key", pa.string()),                  # sha256 of the day's input files + config digest
    pa.field("stage", pa.string()),                       # the stage it is in (kept while running; last one after)
])

#: Nightly drift metrics: one row per run date (re-running a date replaces its row).
#: Units: ratings and rating differences in stars of the configured scale; divergences in bits
#: (log base 2, so Jensen-Shannon lies in [0, 1]); shares in [0, 1]. Nested details (histograms,
#: segments, per-round reference shares, quarantine reasons) live in ``detail_json``.
_F64 = pa.float64()
_I64 = pa.int64()
_EVAL_FIELDS = [pa.field(f"{model}_{stat}", _I64 if stat == "n" else _F64)
                for model in ("candidate", "shadow", "live")
                for stat in ("mae", "mae_lo", "mae_hi", "rmse", "rmse_lo", "rmse_hi", "n")]
NIGHTLY_METRICS = pa.schema([
    pa.field("run_date", pa.string(), nullable=False),            # YYYY-MM-DD
    pa.field("candidate_version", pa.string()),
    pa.field("live_version", pa.string()),
    # selection skew tonight: tonight's organic ratings vs every probe rating in the window
    pa.field("skew_organic_n", _I64), pa.field("skew_probe_n", _I64),
    pa.field("skew_organic_mean", _F64), pa.field("skew_probe_mean", _F64),
    pa.field("skew_mean_shift", _F64),                             # organic mean - probe mean
    pa.field("skew_js", _F64), pa.field("skew_w1", _F64),
    # their standard errors from tonight's organic sampling noise alone (delta method)
    pa.field("skew_mean_shift_se", _F64), pa.field("skew_js_se", _F64), pa.field("skew_w1_se", _F64),
    pa.field("skew_test", pa.string()),                            # "chi2" (stepped scale) or "ks"
    pa.field("skew_stat", _F64), pa.field("skew_pvalue", _F64),
    # the same over the whole training window (smoother, lags a shift)
    pa.field("window_organic_n", _I64), pa.field("window_probe_n", _I64),
    pa.field("window_organic_mean", _F64), pa.field("window_mean_shift", _F64), pa.field("window_js", _F64), pa.field("window_w1", _F64),
    pa.field("window_pvalue", _F64),
    # per-user skew (users with both kinds of rating in the window)
    pa.field("users_with_both", _I64), pa.field("users_unknown", _I64),
    pa.field("user_skew_mean", _F64), pa.field("user_skew_median", _F64),
    pa.field("share_up", _F64), pa.field("share_down", _F64), pa.field("share_neutral", _F64),
    # probe errors and reference users
    pa.field("probe_error_users", _I64), pa.field("probe_error_mean", _F64),
    pa.field("probe_error_median", _F64), pa.field("probe_error_p90", _F64),
    pa.field("reference_rounds", _I64), pa.field("reference_share_mean", _F64),
    # predicted ratings: candidate vs live
    pa.field("pred_pairs", _I64), pa.field("pred_candidate_mean", _F64), pa.field("pred_live_mean", _F64),
    pa.field("pred_psi", _F64), pa.field("pred_js", _F64),
    pa.field("profile_users", _I64), pa.field("profile_move_mean", _F64), pa.field("profile_move_p90", _F64),
    # held-out probe accuracy
    *_EVAL_FIELDS,
    # the anchor (the strongest recent version) on the held-out ratings both it and the candidate are
    # scored on: its MAE, the candidate's and live's on the same rows, candidate minus anchor
    pa.field("anchor_version", pa.string()), pa.field("anchor_n", _I64), pa.field("anchor_mae", _F64),
    pa.field("anchor_candidate_mae", _F64), pa.field("anchor_live_mae", _F64), pa.field("anchor_margin", _F64),
    # volumes
    pa.field("rows_read", _I64), pa.field("rows_ingested", _I64), pa.field("rows_quarantined", _I64),
    pa.field("quarantine_share", _F64), pa.field("new_users", _I64), pa.field("new_items", _I64),
    pa.field("active_users", _I64), pa.field("probe_users", _I64), pa.field("probe_coverage", _F64),
    pa.field("detail_json", pa.string()),
])

#: A probe plan (`tarewise probe-plan`): the members to show the probe card to on one date. The plan
#: chooses people, never items. ``drawn_by``: "planned" (highest expected error reduction) or "uniform"
#: (the uniform share); ``draw_probability``: the chance this member was chosen (1 for planned ones), for
#: reweighting held-out errors; ``score``: expected reduction of error variance, squared rating units.
PROBE_PLAN = pa.schema([
    pa.field("member_id", pa.string(), nullable=False),
    pa.field("reason", pa.string(), nullable=False),
    pa.field("score", pa.float64(), nullable=False),
    pa.field("drawn_by", pa.string(), nullable=False),
    pa.field("draw_probability", pa.float64(), nullable=False),
])
