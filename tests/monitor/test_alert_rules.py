"""Skew-shift alert rules: the robust band, its floor, absolute guards, cool-down folding, and the
behaviour of the whole rule on simulated nights.

The simulated nights follow the invented library-app scenario: members of a reading app rate
audiobooks and e-books 1-5 stars; most rate what they pick (some pick titles they love, some titles
they dislike, the rest pick at random), and about 3% of active members each night answer a "rate a
random title" card (the probe). All numbers are invented.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from tasks.monitor.alert_rules import (
    KIND_COVERAGE,
    KIND_QUARANTINE,
    KIND_SKEW,
    KIND_WORSE,
    Alert,
    evaluate_alerts,
    fold_alerts,
    guard_alerts,
    robust_band,
    skew_alerts,
)
from tasks.config import Config, LabelsConfig, ConfigError
from tasks.monitor.night_metrics import compute_night_metrics

CFG = Config()


# ----------------------------------------------------------------------------------------------
# The band
# ----------------------------------------------------------------------------------------------

def test_robust_band_by_hand():
    values = [1.0, 2.0, 3.0, 4.0, 100.0]
    # median 3; |dev| = 2,1,0,1,97 -> MAD 1; sigma estimate 1.4826 MAD, the normal-consistent MAD of
    # scipy.stats.median_abs_deviation(scale="normal") (reference library function; 1 / Phi^-1(3/4));
    # prediction widening sqrt(1 + pi / (2 * 5))
    assert stats.median_abs_deviation(values, scale="normal") == pytest.approx(1.4826, abs=1e-4)
    band = robust_band(values, k=4.0, floor=0.0)
    scale = 1.4826 * math.sqrt(1 + math.pi / 10)
    assert band.median == 3.0 and band.n == 5 and not band.floored
    assert band.scale == pytest.approx(scale)
    assert (band.lo, band.hi) == (pytest.approx(3 - 4 * scale), pytest.approx(3 + 4 * scale))
    # the outlier (100) does not widen the band, unlike a standard deviation would
    assert band.hi < 15
    assert robust_band([math.nan, None], 4.0, 0.1) is None


def test_the_median_variance_behind_the_band_widening():
    """c_n = sqrt(1 + pi / (2 n)) assumes the median of n normal values varies by pi / (2 n) sigma^2 (from
    memory: the large-sample variance of a sample quantile). Simulated: the band errs wide for short
    baselines and the formula holds from a few dozen nights on."""
    rng = np.random.default_rng(11)
    for n, lo, hi in ((5, 0.85, 1.0), (14, 0.85, 1.0), (51, 0.96, 1.04), (201, 0.97, 1.03)):
        medians = np.median(rng.standard_normal((100_000, n)), axis=1)
        assert lo <= medians.var() / (math.pi / (2 * n)) <= hi, n


def _night(date: str, **values) -> dict:
    return {"run_date": date, **values}


def _flat_history(n: int, **values) -> pd.DataFrame:
    dates = pd.date_range("2024-04-01", periods=n).strftime("%Y-%m-%d")
    return pd.DataFrame([_night(d, **values) for d in dates])


def test_flat_history_does_not_alert_on_float_noise_but_does_on_a_real_move():
    hist = _flat_history(14, skew_mean_shift=0.40, skew_w1=0.45)  # MAD = 0 for both
    tiny = _night("2024-04-15", skew_mean_shift=0.40 + 1e-12, skew_w1=0.45 - 1e-12)
    assert skew_alerts(tiny, hist, CFG) == []
    # the floor is 0.5% of the 4-star range = 0.02 stars; k = 4 -> about 0.083 stars with the
    # prediction widening at n = 14; 0.05 stars is inside, 0.2 stars is far outside
    assert skew_alerts(_night("2024-04-15", skew_mean_shift=0.45, skew_w1=0.45), hist, CFG) == []
    [alert] = skew_alerts(_night("2024-04-15", skew_mean_shift=0.60, skew_w1=0.45), hist, CFG)
    assert alert.kind == KIND_SKEW and alert.metric == "skew_mean_shift" and alert.extra["floored"]
    assert alert.band[1] == pytest.approx(0.40 + 4 * 0.02 * math.sqrt(1 + math.pi / 28))
    assert "0.60 rating points tonight, above its usual range" in alert.explanation
    assert alert.explanation.endswith("Users are choosing what to rate differently than of late.")
    # a deployment's own words come from [labels]
    words = CFG.model_copy(update={"labels": LabelsConfig(users="members", rating_unit="stars")})
    [own] = skew_alerts(_night("2024-04-15", skew_mean_shift=0.60, skew_w1=0.45), hist, words)
    assert "0.60 stars tonight" in own.explanation and "Members are choosing" in own.explanation


def test_tonight_sampling_noise_widens_the_band():
    hist = _flat_history(14, skew_mean_shift=0.40, skew_w1=0.45)
    night = _night("2024-04-15", skew_mean_shift=0.60, skew_w1=0.45)
    assert skew_alerts(night, hist, CFG)
    # a tiny night whose own standard error is 0.1 stars is not held to a 0.02-star band
    assert skew_alerts({**night, "skew_mean_shift_se": 0.1}, hist, CFG) == []


def test_no_skew_alert_before_min_baseline_nights():
    d = CFG.drift.min_baseline_nights
    jump = {"skew_mean_shift": 2.0, "skew_w1": 2.0}
    assert skew_alerts(_night("2024-05-01", **jump), _flat_history(d - 1, skew_mean_shift=0.1, skew_w1=0.2), CFG) == []
    assert skew_alerts(_night("2024-05-01", **jump), _flat_history(d, skew_mean_shift=0.1, skew_w1=0.2), CFG)
    # the baseline is the nights *before* tonight; a row for tonight itself in the history is ignored
    hist = _flat_history(d, skew_mean_shift=0.1, skew_w1=0.2)
    assert skew_alerts(_night(hist["run_date"].iloc[-1], **jump), hist, CFG) == []


def test_one_skew_alert_names_the_furthest_metric_and_lists_the_others():
    hist = _flat_history(10, skew_mean_shift=0.40, skew_w1=0.45)
    [alert] = skew_alerts(_night("2024-04-11", skew_mean_shift=0.9, skew_w1=0.7), hist, CFG)
    assert alert.metric == "skew_mean_shift" and alert.also == ("skew_w1",)
    assert alert.severity == "critical"  # 0.5 stars is more than 2k band scales away


def test_inconsistent_drift_settings_are_named():
    # Caught when the config is validated, before any night runs.
    with pytest.raises(ConfigError, match="drift.min_baseline_nights"):
        CFG.updated({"drift.min_baseline_nights": 20, "drift.baseline_nights": 10})


# ----------------------------------------------------------------------------------------------
# Absolute guards
# ----------------------------------------------------------------------------------------------

def test_guards():
    calm = _night("2024-04-11", probe_coverage=0.03, active_users=1000, quarantine_share=0.001,
                  candidate_mae=0.80, candidate_mae_lo=0.75, candidate_mae_hi=0.85, candidate_n=400,
                  shadow_mae=0.80, shadow_mae_lo=0.75, shadow_mae_hi=0.85)
    assert guard_alerts(calm, CFG) == []
    kinds = {a.kind: a for a in guard_alerts({**calm, "probe_coverage": 0.001, "quarantine_share": 0.2,
                                              "candidate_mae": 0.95, "candidate_mae_lo": 0.90}, CFG)}
    assert set(kinds) == {KIND_COVERAGE, KIND_QUARANTINE, KIND_WORSE}
    assert kinds[KIND_COVERAGE].severity == "critical" and "0.10%" in kinds[KIND_COVERAGE].explanation
    assert kinds[KIND_WORSE].severity == "critical"  # intervals 0.90.. vs ..0.85 do not overlap
    # worse by more than the tolerance but overlapping intervals: a warning
    [w] = guard_alerts({**calm, "candidate_mae": 0.83}, CFG)
    assert w.kind == KIND_WORSE and w.severity == "warning"
    # too few held-out ratings: no verdict
    assert guard_alerts({**calm, "candidate_mae": 0.95, "candidate_n": 3}, CFG) == []
    # no active members: coverage undefined, no alert
    assert guard_alerts({**calm, "probe_coverage": math.nan, "active_users": 0}, CFG) == []


# ----------------------------------------------------------------------------------------------
# Cool-down folding
# ----------------------------------------------------------------------------------------------

def _raw(kind: str, date: str) -> Alert:
    return Alert(kind=kind, severity="warning", metric="m", value=1.0, band=(0.0, 0.5), explanation="x",
                 run_date=date)


def _fold_sequence(dates: list[str], cooldown: int, kind: str = KIND_SKEW) -> list[Alert]:
    history: list[dict] = []
    out = []
    for d in dates:
        [a] = fold_alerts([_raw(kind, d)], history, d, cooldown)
        history.append(a.to_record())
        out.append(a)
    return out


def test_fold_within_cooldown_counts_and_dates():
    a = _fold_sequence(["2024-04-01", "2024-04-02", "2024-04-05", "2024-04-09"], cooldown=3)
    assert [x.status for x in a] == ["new", "ongoing", "ongoing", "new"]
    assert [x.count for x in a] == [1, 2, 3, 1]
    assert a[2].alert_id == "skew_shift-2024-04-01" and a[2].first_date == "2024-04-01"
    assert a[2].last_date == "2024-04-05"
    assert a[3].alert_id == "skew_shift-2024-04-09"  # 4 nights after the last one: a new episode


def test_fold_kinds_are_separate_and_cooldown_zero_never_folds():
    history = [_fold_sequence(["2024-04-01"], 3)[0].to_record()]
    [other] = fold_alerts([_raw(KIND_COVERAGE, "2024-04-02")], history, "2024-04-02", 3)
    assert other.status == "new" and other.alert_id == "probe_coverage_low-2024-04-02"
    assert [x.status for x in _fold_sequence(["2024-04-01", "2024-04-02"], cooldown=0)] == ["new", "new"]


def test_rerun_of_a_night_does_not_grow_the_count():
    seq = _fold_sequence(["2024-04-01", "2024-04-02"], cooldown=3)
    history = [x.to_record() for x in seq]
    [again] = fold_alerts([_raw(KIND_SKEW, "2024-04-02")], history, "2024-04-02", 3)
    assert (again.alert_id, again.status, again.count) == ("skew_shift-2024-04-01", "ongoing", 2)
    [first] = fold_alerts([_raw(KIND_SKEW, "2024-04-01")], history, "2024-04-01", 3)
    assert (first.status, first.count, first.last_date) == ("new", 2, "2024-04-02")


# ----------------------------------------------------------------------------------------------
# Simulated nights run through compute_night_metrics + the rule
# ----------------------------------------------------------------------------------------------

LOVER, HATER, RANDOM = 0, 1, 2


def simulate_nights(seed: int, nights: int = 30, shift_night: int | None = None, members: int = 2500,
                    titles: int = 600, active_share: float = 0.3, organic_per_active: float = 2.0,
                    probe_share: float = 0.03, lovers: float = 0.25, haters: float = 0.1,
                    choice: int = 6) -> pd.DataFrame:
    """Ratings of ``nights`` nights, sorted by ``dt``.

    Each member has a leniency, each title an appeal; the star rating is
    ``clip(round(3.2 + leniency + appeal + noise), 1, 5)``. Each night about ``active_share`` of
    members are active and give Poisson(``organic_per_active``) organic ratings: lovers pick the
    title they like best among ``choice`` random ones, haters the one they like least, the rest take
    the first. Each active member answers a probe card with chance ``probe_share`` (a uniformly
    random title). From ``shift_night`` on, as many random members turn into lovers as there were
    lovers, doubling the lovers' share.
    """
    rng = np.random.default_rng(seed)
    leniency = rng.normal(0.0, 0.5, members)
    appeal = rng.normal(0.0, 0.7, titles)
    habit = rng.choice(3, size=members, p=[lovers, haters, 1 - lovers - haters])
    converts = rng.choice(np.flatnonzero(habit == RANDOM), size=int(np.sum(habit == LOVER)), replace=False)
    start = pd.Timestamp("2024-03-01")
    users, items, ratings, probe, dts = [], [], [], [], []
    for night in range(nights):
        if shift_night is not None and night == shift_night:
            habit = habit.copy()
            habit[converts] = LOVER
        active = np.flatnonzero(rng.random(members) < active_share)
        who = np.repeat(active, rng.poisson(organic_per_active, active.size))
        options = rng.integers(0, titles, size=(who.size, choice))
        liking = leniency[who, None] + appeal[options] + rng.normal(0.0, 0.6, options.shape)
        pick = np.where(habit[who] == LOVER, liking.argmax(1), np.where(habit[who] == HATER, liking.argmin(1), 0))
        rows = np.arange(who.size)
        prober = active[rng.random(active.size) < probe_share]
        random_title = rng.integers(0, titles, prober.size)
        probe_liking = leniency[prober] + appeal[random_title] + rng.normal(0.0, 0.6, prober.size)
        users += [who, prober]
        items += [options[rows, pick], random_title]
        ratings += [liking[rows, pick], probe_liking]
        probe += [np.zeros(who.size, bool), np.ones(prober.size, bool)]
        dts.append(np.full(who.size + prober.size, night))
    day = np.concatenate(dts)
    member_ids = [f"member-{i:06d}" for i in range(members)]
    title_ids = [f"title-{i:06d}" for i in range(titles)]
    date_ids = [(start + pd.Timedelta(days=i)).strftime("%Y-%m-%d") for i in range(nights)]
    return pd.DataFrame({
        # categoricals: the same dtype a hive-partitioned Parquet read gives for ``dt``, and cheap
        "user_id": pd.Categorical.from_codes(np.concatenate(users), member_ids),
        "item_id": pd.Categorical.from_codes(np.concatenate(items), title_ids),
        "rating": np.clip(np.rint(3.2 + np.concatenate(ratings)), 1, 5),
        "source": pd.Categorical.from_codes(np.concatenate(probe).astype(int), ["organic", "probe"]),
        "dt": pd.Categorical.from_codes(day, date_ids),
    })


def skew_alert_nights(ratings: pd.DataFrame, cfg: Config = CFG) -> list[int]:
    """Run every night through compute_night_metrics and the rule; the nights (0-based) with a
    skew-shift alert. The window is every night so far (the 30-day window never fills here)."""
    days = ratings["dt"].cat.codes.to_numpy()
    ends = np.searchsorted(days, np.arange(days.max() + 1), side="right")
    dates = list(ratings["dt"].cat.categories)
    history: list[dict] = []
    alerted = []
    for night, end in enumerate(ends):
        row = compute_night_metrics(dates[night], ratings.iloc[:end], cfg.scale, cfg.evaluate.skew_margin)
        if any(a.kind == KIND_SKEW for a in evaluate_alerts(row, pd.DataFrame(history), cfg)):
            alerted.append(night)
        history.append({k: row[k] for k in ("run_date", "skew_mean_shift", "skew_w1", "skew_js")})
    return alerted


def test_simulated_nights_have_realistic_skew():
    """Guard on the simulator itself, so the alert tests below run on data that looks like the
    scenario: organic ratings above probe ratings, a few percent probe coverage."""
    r = simulate_nights(0, nights=5)
    organic = r[r["source"] == "organic"]["rating"]
    probes = r[r["source"] == "probe"]["rating"]
    assert organic.mean() - probes.mean() > 0.05
    assert 0.005 < len(probes) / r[r["source"] == "organic"]["user_id"].nunique() < 0.1


#: Stable series checked on every test run. The full measurement (seeds 0-199, 30 nights each,
#: default drift settings: 14-night baseline, k = 4, no alerts before 5 nights) gave 3 of 200 series
#: (1.5%) with a skew alert, one night each (seeds 47, 85, 174): 3 of the 5,000 nights that could
#: alert (0.06%). Re-run it with ``pytest -m long -k false_alarm``.
STABLE_SEEDS_QUICK = range(40)


def _false_alarm_series(seeds) -> list[int]:
    return [s for s in seeds if skew_alert_nights(simulate_nights(s))]


def test_stable_nights_rarely_alert():
    flagged = _false_alarm_series(STABLE_SEEDS_QUICK)
    # measured: see STABLE_SEEDS_QUICK; at most 2 of 40 (5%) is the acceptance line
    assert len(flagged) <= 2, f"stable series with skew alerts: {flagged}"


@pytest.mark.long
def test_stable_nights_false_alarm_rate_200_series():
    flagged = _false_alarm_series(range(200))
    assert len(flagged) / 200 <= 0.05, f"{len(flagged)} of 200 stable series alerted: {flagged}"


@pytest.mark.parametrize("seed", [1000, 1001, 1002, 1003, 1004, 1005])
def test_lovers_share_doubling_is_alerted_within_two_nights(seed):
    shift = 20
    nights = skew_alert_nights(simulate_nights(seed, nights=24, shift_night=shift))
    after = [n for n in nights if n >= shift]
    assert after and after[0] <= shift + 1, f"alerts on nights {nights}; shift on night {shift}"
