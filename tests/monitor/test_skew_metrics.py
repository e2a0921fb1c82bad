"""Selection-skew metric functions checked against reference libraries and worked examples.

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
from scipy.spatial.distance import jensenshannon

from tasks.config import ScaleConfig
from tasks.schemas import NIGHTLY_METRICS
from tasks.monitor.skew_metrics import (
    bin_index,
    chi2_homogeneity,
    compute_night_metrics,
    histogram,
    js_divergence,
    ks_two_sample,
    night_noise_se,
    population_stability_index,
    profile_movement,
    rating_bin_edges,
    skew_summary,
    user_skew,
    user_skew_segments,
    wasserstein1,
    wasserstein1_binned,
)

STARS = ScaleConfig()  # 1..5, step 1


def _stars(rng: np.random.Generator, n: int, shares: list[float]) -> np.ndarray:
    return rng.choice([1.0, 2.0, 3.0, 4.0, 5.0], size=n, p=shares)


# ----------------------------------------------------------------------------------------------
# Reference-library checks
# ----------------------------------------------------------------------------------------------

@pytest.mark.parametrize("seed", [0, 1, 2])
def test_js_divergence_matches_scipy(seed):
    rng = np.random.default_rng(seed)
    p = rng.integers(0, 50, 5).astype(float)
    q = rng.integers(1, 50, 5).astype(float)
    p[seed % 5] = 0.0  # an empty bin on one side must be handled
    # reference: scipy.spatial.distance.jensenshannon returns the JS *distance* (square root of the
    # divergence); with base=2 its square is the divergence in bits.
    assert js_divergence(p, q) == pytest.approx(jensenshannon(p, q, base=2) ** 2, abs=1e-12)


def test_js_divergence_bounds_and_empty():
    assert js_divergence([5, 0, 0], [5, 0, 0]) == pytest.approx(0.0, abs=1e-15)
    # disjoint supports: the maximum, 1 bit (follows from the definition with log base 2)
    assert js_divergence([3, 0], [0, 7]) == pytest.approx(1.0)
    assert math.isnan(js_divergence([0, 0], [1, 2]))


@pytest.mark.parametrize("seed", [0, 1])
def test_wasserstein_matches_scipy(seed):
    rng = np.random.default_rng(seed)
    a = rng.normal(3.2, 0.9, 400)
    b = rng.normal(3.6, 1.3, 250)
    # reference: scipy.stats.wasserstein_distance (1-D earth mover's distance of two samples)
    assert wasserstein1(a, b) == pytest.approx(stats.wasserstein_distance(a, b), rel=1e-12)
    # on a stepped scale the binned version must agree with the sample version and with scipy
    ra = _stars(rng, 300, [0.05, 0.1, 0.2, 0.3, 0.35])
    rb = _stars(rng, 120, [0.1, 0.2, 0.4, 0.2, 0.1])
    edges = rating_bin_edges(STARS)
    binned = wasserstein1_binned(histogram(ra, edges), histogram(rb, edges), np.arange(1.0, 6.0))
    assert binned == pytest.approx(stats.wasserstein_distance(ra, rb), rel=1e-12)
    assert wasserstein1(ra, rb) == pytest.approx(binned, rel=1e-12)


def test_chi2_homogeneity_matches_scipy():
    a = np.array([12, 30, 55, 80, 23])
    b = np.array([10, 22, 31, 20, 5])
    stat, dof, p = chi2_homogeneity(a, b)
    # reference: scipy.stats.chi2_contingency on the 2 x L table, no continuity correction
    ref = stats.chi2_contingency(np.vstack([a, b]), correction=False)
    assert stat == pytest.approx(ref.statistic, rel=1e-12)
    assert dof == ref.dof == 4
    assert p == pytest.approx(ref.pvalue, rel=1e-9)
    # reference: scipy.stats.chisquare on the flattened table against the expected counts, with
    # ddof = L so the degrees of freedom are 2L - 1 - L = L - 1 as for homogeneity
    table = np.vstack([a, b]).astype(float)
    expected = np.outer(table.sum(1), table.sum(0)) / table.sum()
    ref2 = stats.chisquare(table.ravel(), expected.ravel(), ddof=len(a))
    assert stat == pytest.approx(ref2.statistic, rel=1e-12)
    assert p == pytest.approx(ref2.pvalue, rel=1e-9)


def test_chi2_homogeneity_drops_empty_bins_and_degenerate_cases():
    stat, dof, p = chi2_homogeneity([10, 0, 5], [4, 0, 9])
    ref = stats.chi2_contingency(np.array([[10, 5], [4, 9]]), correction=False)  # scipy.stats.chi2_contingency
    assert (stat, dof) == (pytest.approx(ref.statistic), 1)
    assert p == pytest.approx(ref.pvalue)
    assert chi2_homogeneity([0, 7, 0], [0, 3, 0]) == (0.0, 0, 1.0)
    assert math.isnan(chi2_homogeneity([0, 0], [1, 1])[2])


@pytest.mark.parametrize("seed", [0, 3])
def test_ks_two_sample_matches_scipy_asymptotic(seed):
    rng = np.random.default_rng(seed)
    a = rng.normal(3.0, 1.0, 700)
    b = rng.normal(3.15, 1.1, 500)
    d, p = ks_two_sample(a, b)
    # reference: scipy.stats.ks_2samp with method="asymp" (Smirnov's asymptotic p-value)
    ref = stats.ks_2samp(a, b, method="asymp")
    assert d == pytest.approx(ref.statistic, abs=1e-12)
    assert p == pytest.approx(ref.pvalue, rel=1e-9)


def test_psi_worked_by_hand():
    # Textbook PSI = sum (a - e) ln(a / e) over bins, with a, e the bin shares.
    # live (expected) counts 20/30/50 -> shares .2/.3/.5; candidate (actual) 30/30/40 -> .3/.3/.4
    #   bin 1: (0.3 - 0.2) ln(0.3/0.2) = 0.1 * 0.405465 = 0.0405465
    #   bin 2: 0
    #   bin 3: (0.4 - 0.5) ln(0.4/0.5) = -0.1 * -0.223144 = 0.0223144
    #   total = 0.0628609
    assert population_stability_index([30, 30, 40], [20, 30, 50]) == pytest.approx(0.0628609, abs=1e-6)
    # symmetric in its arguments (each term is)
    assert population_stability_index([20, 30, 50], [30, 30, 40]) == pytest.approx(0.0628609, abs=1e-6)
    assert population_stability_index([1, 2, 3], [2, 4, 6]) == pytest.approx(0.0, abs=1e-15)
    # an empty bin is floored at 1e-4: (0.5 - 1e-4) ln(0.5 / 1e-4) + (0.5 - 1) ln(0.5 / 1)
    expected = (0.5 - 1e-4) * math.log(0.5 / 1e-4) + (0.5 - 1.0) * math.log(0.5)
    assert population_stability_index([5, 5], [0, 10]) == pytest.approx(expected, rel=1e-12)


def test_night_noise_se_matches_simulated_spread():
    """The delta-method error of tonight's mean shift / W1 / JS should match the spread seen when the
    same night is drawn many times (delta method: e.g. Casella & Berger 2002, Statistical Inference,
    2nd ed., section 5.5.4, from memory). Independent ratings, so no member clustering here."""
    rng = np.random.default_rng(11)
    edges = rating_bin_edges(STARS)
    organic_shares = [0.06, 0.09, 0.2, 0.33, 0.32]
    probe = _stars(rng, 2000, [0.08, 0.17, 0.35, 0.27, 0.13])
    h_probe = histogram(probe, edges)
    draws = {"mean_shift": [], "w1": [], "js": []}
    for _ in range(400):
        s = skew_summary(_stars(rng, 600, organic_shares), probe, STARS)
        for k in draws:
            draws[k].append(s[k])
    one = _stars(rng, 600, organic_shares)
    se = night_noise_se(bin_index(one, edges), h_probe, np.arange(1.0, 6.0))
    for k in ("mean_shift", "w1", "js"):
        # 400 draws estimate a standard deviation to about +-4% (1 / sqrt(2 * 400)); allow 20%
        assert se[k] == pytest.approx(np.std(draws[k]), rel=0.2), k


# ----------------------------------------------------------------------------------------------
# Per-member skew and segments
# ----------------------------------------------------------------------------------------------

def _window() -> pd.DataFrame:
    rows = [
        # member-000001 rates what they love: organic 5,5,4 vs probe 3 -> skew +1.667 (up)
        ("member-000001", "title-000010", 5.0, "organic", "2024-05-01"),
        ("member-000001", "title-000011", 5.0, "organic", "2024-05-02"),
        ("member-000001", "title-000012", 4.0, "organic", "2024-05-02"),
        ("member-000001", "title-000013", 3.0, "probe", "2024-05-02"),
        # member-000002 rates what they dislike: organic 1,2 vs probes 3,4 -> skew -2 (down)
        ("member-000002", "title-000010", 1.0, "organic", "2024-05-01"),
        ("member-000002", "title-000014", 2.0, "organic", "2024-05-02"),
        ("member-000002", "title-000015", 3.0, "probe", "2024-05-01"),
        ("member-000002", "title-000016", 4.0, "probe", "2024-05-02"),
        # member-000003: organic 3,4 vs probe 3 -> +0.5 exactly at the margin -> neutral
        ("member-000003", "title-000010", 3.0, "organic", "2024-05-02"),
        ("member-000003", "title-000017", 4.0, "organic", "2024-05-02"),
        ("member-000003", "title-000018", 3.0, "probe", "2024-05-02"),
        # member-000004: organic only -> unknown;  member-000005: probe only -> unknown
        ("member-000004", "title-000011", 4.0, "organic", "2024-05-02"),
        ("member-000005", "title-000012", 2.0, "probe", "2024-05-01"),
    ]
    return pd.DataFrame(rows, columns=["user_id", "item_id", "rating", "source", "dt"])


def test_user_skew_and_segments_by_hand():
    w = _window()
    per = user_skew(w)
    assert per.loc["member-000001", "skew"] == pytest.approx(14 / 3 - 3)
    assert per.loc["member-000002", "skew"] == pytest.approx(-2.0)
    assert math.isnan(per.loc["member-000004", "skew"]) and math.isnan(per.loc["member-000005", "skew"])
    seg = user_skew_segments(w, margin=0.5)
    assert seg.to_dict() == {"member-000001": "up", "member-000002": "down", "member-000003": "neutral",
                             "member-000004": "unknown", "member-000005": "unknown"}
    # a smaller margin moves member-000003 (+0.5) to "up"
    assert user_skew_segments(w, margin=0.4)["member-000003"] == "up"


def test_profile_movement():
    a = np.array([[0.1, 0.5, 0.9], [0.0, 0.2, 0.4]])
    b = np.array([[0.1, 0.4, 0.6], [0.0, 0.2, 0.4]])
    np.testing.assert_allclose(profile_movement(a, b), [(0 + 0.1 + 0.3) / 3, 0.0])
    with pytest.raises(ValueError, match="one shape"):
        profile_movement(a, b[:, :2])


def test_compute_night_metrics_row_by_hand():
    w = _window()
    ev = {"candidate": {"mae": 0.8, "mae_lo": 0.7, "mae_hi": 0.9, "rmse": 1.0, "rmse_lo": 0.9, "rmse_hi": 1.1,
                        "n": 40, "segments": {"up": {"mae": 0.9}}},
          "shadow": {"mae": 0.85, "n": 40}, "live": None}
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
    w = _window()
    w = w[w["source"] == "organic"]
    row = compute_night_metrics("2024-05-02", w, STARS, 0.5, pred_candidate=np.array([3.0, 4.0]))
    assert row["skew_probe_n"] == 0 and math.isnan(row["skew_mean_shift"]) and math.isnan(row["skew_js"])
    assert math.isnan(row["pred_psi"]) and row["pred_live_mean"] != row["pred_live_mean"]
    json.loads(row["detail_json"])  # strict JSON (no NaN tokens)


def test_compute_night_metrics_accepts_categorical_and_continuous_scale():
    w = _window()
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
        compute_night_metrics("2024-05-02", _window().drop(columns="source"), STARS, 0.5)
