"""One night's metrics row, worked by hand on a small window (tests/handmade.py).

Demo ids follow the invented library-app scenario (members rate titles 1-5 stars); all numbers are
invented.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from handmade import member_window, model_errors
from tasks.config import ScaleConfig
from tasks.evaluate.evaluation import Evaluation
from tasks.monitor.night_metrics import compute_night_metrics, jsonable
from tasks.schemas import NIGHTLY_METRICS

STARS = ScaleConfig()  # 1..5, step 1


def test_compute_night_metrics_row_by_hand():
    w = member_window()
    ev = Evaluation(candidate=model_errors(0.8, n=40, segments={"up": (0.9, 12)}), shadow=model_errors(0.85, n=40))
    row = compute_night_metrics(
        "2024-05-02", w, STARS, 0.5,
        probe_errors=pd.Series([0.5, 1.0, 1.5], index=["member-000001", "member-000002", "member-000003"]),
        reference_shares=[0.2, 0.3],
        pred_candidate=np.array([3.0, 4.0, 4.5, 2.0]), pred_live=np.array([3.0, 3.5, 4.5, 2.5]),
        profiles_candidate=np.array([[0.2, 0.6]]), profiles_live=np.array([[0.1, 0.6]]),
        evaluation=ev,
        volumes={"rows_read": 100, "rows_ingested": 96, "rows_quarantined": 4, "new_users": 1, "new_items": 2,
                 "quarantined_by_reason": {"rating_out_of_range": 3, "<bad> id": 1}},
        versions={"candidate": "v-2", "live": "v-1"})
    assert set(row) == set(NIGHTLY_METRICS.names)
    # tonight's organic ratings (dt 2024-05-02): 5, 4, 2, 3, 4, 4 -> mean 22/6; window probes 3,3,4,3,2 -> 3
    assert row["skew_organic_n"] == 6 and row["skew_probe_n"] == 5
    assert row["skew_mean_shift"] == pytest.approx(22 / 6 - 3.0)
    assert row["window_organic_n"] == 8
    assert row["users_with_both"] == 3 and row["users_unknown"] == 2
    assert row["share_up"] == pytest.approx(1 / 3) and row["share_down"] == pytest.approx(1 / 3)
    assert row["probe_error_median"] == pytest.approx(1.0)
    assert row["reference_rounds"] == 2 and row["reference_share_mean"] == pytest.approx(0.25)
    assert row["pred_pairs"] == 4 and row["pred_psi"] > 0
    assert row["profile_move_mean"] == pytest.approx(0.05)
    assert row["quarantine_share"] == pytest.approx(0.04)
    # active members tonight: 000001..000004 (000005 only rated on 05-01); with a probe: 000001, 000002, 000003
    assert row["active_users"] == 4 and row["probe_users"] == 3 and row["probe_coverage"] == pytest.approx(0.75)
    assert row["candidate_mae"] == 0.8 and row["shadow_mae"] == 0.85 and math.isnan(row["live_mae"])
    detail = json.loads(row["detail_json"])
    assert detail["hist_tonight_organic"] == [0, 1, 1, 3, 1]
    assert detail["segments"]["up"]["users"] == 1
    assert detail["quarantined_by_reason"] == {"<bad> id": 1, "rating_out_of_range": 3}
    assert detail["evaluation_segments"]["candidate"]["up"]["mae"] == 0.9


def test_compute_night_metrics_first_night_without_live_or_probes():
    w = member_window()
    w = w[w["source"] == "organic"]
    row = compute_night_metrics("2024-05-02", w, STARS, 0.5, pred_candidate=np.array([3.0, 4.0]))
    assert row["skew_probe_n"] == 0 and math.isnan(row["skew_mean_shift"]) and math.isnan(row["skew_js"])
    assert math.isnan(row["pred_psi"]) and row["pred_live_mean"] != row["pred_live_mean"]
    json.loads(row["detail_json"])  # strict JSON (no NaN tokens)


def test_compute_night_metrics_accepts_categorical_and_continuous_scale():
    w = member_window()
    cat = w.astype({"user_id": "category", "source": "category", "dt": "category"})
    assert compute_night_metrics("2024-05-02", cat, STARS, 0.5)["skew_mean_shift"] == pytest.approx(22 / 6 - 3)
    cont = ScaleConfig(min=1.0, max=5.0, step=0.0)
    row = compute_night_metrics("2024-05-02", w, cont, 0.5)
    assert row["skew_test"] == "ks"
    # W1 on a continuous scale uses the raw ratings (reference: scipy.stats.wasserstein_distance)
    org = w[(w["source"] == "organic") & (w["dt"] == "2024-05-02")]["rating"]
    assert row["skew_w1"] == pytest.approx(stats.wasserstein_distance(org, w[w["source"] == "probe"]["rating"]))


def test_missing_column_is_named():
    with pytest.raises(ValueError, match="source"):
        compute_night_metrics("2024-05-02", member_window().drop(columns="source"), STARS, 0.5)


def test_held_out_errors_per_model_and_without_evaluation():
    ev = Evaluation(candidate=model_errors(0.8, n=40, segments={"up": (0.9, 12), "down": (0.7, 9)}),
                    shadow=model_errors(0.85, n=40))
    row = compute_night_metrics("2024-05-02", member_window(), STARS, 0.5, evaluation=ev)
    assert (row["candidate_n"], row["shadow_n"], row["live_n"]) == (40, 40, None)
    assert row["candidate_mae_lo"] == pytest.approx(0.75) and row["shadow_rmse_hi"] == pytest.approx(1.05)
    detail = json.loads(row["detail_json"])
    # only models with per-segment errors are listed, each segment as in the manifest
    assert detail["evaluation_segments"] == {"candidate": {k: s.to_dict() for k, s in ev.candidate.segments.items()}}
    bare = compute_night_metrics("2024-05-02", member_window(), STARS, 0.5)
    assert all(math.isnan(bare[f"{m}_mae"]) and bare[f"{m}_n"] is None for m in ("candidate", "shadow", "live"))
    assert json.loads(bare["detail_json"])["evaluation_segments"] == {}


def test_jsonable_gives_strict_json_types():
    out = jsonable({"a": np.float32(0.5), 3: [np.int64(2), math.nan, np.inf], "b": np.array([True, False]),
                    "c": (1.5, None), "d": pd.Series([1, 2])})
    assert out == {"a": 0.5, "3": [2, None, None], "b": [True, False], "c": [1.5, None], "d": [1, 2]}
    assert type(out["3"][0]) is int and type(out["b"][0]) is bool
    json.dumps(out, allow_nan=False)
