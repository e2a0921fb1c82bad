"""The probe budget: resampling the stored held-out probe ratings, checked against closed forms."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from tasks.config import GateConfig
from tasks.evaluate.probe_budget import own_share_thinned, probe_budget, resampled_means


def _night(n: int = 1500, seed: int = 3, noise: float = 0.4):
    rng = np.random.default_rng(seed)
    cand = np.abs(rng.normal(0.0, 0.9, n))
    base = np.abs(cand + rng.normal(0.0, noise, n))
    return cand, base


def test_resampled_spread_matches_the_standard_error_of_a_mean() -> None:
    """sd of resampled means of size n = sd / sqrt(n); reference: ``scipy.stats.sem`` of the pool (ddof=0)
    rescaled from the pool's size to n. 4000 draws: the sd's Monte Carlo error is about 1.1%, 5% is
    about 4.5 of those (common practice, no source)."""
    values, _ = _night()
    rng = np.random.default_rng(0)
    for n in (50, 400, 1500):
        measured = float(np.std(resampled_means(values, n, 4000, rng)))
        closed = stats.sem(values, ddof=0) * math.sqrt(len(values)) / math.sqrt(n)
        assert measured == pytest.approx(closed, rel=0.05)


def test_measured_width_and_power_follow_the_closed_forms() -> None:
    """Width: 2 z sd / sqrt(n) with z from ``scipy.stats.norm.ppf``; power: 1 - Phi((tol - d) / se) from
    ``scipy.stats.norm``. Resampled with 400 draws: a share's Monte Carlo sd is at most 0.025; allowed
    0.09 (about 3.5 sd, common practice, no source)."""
    cand, base = _night()
    gate = GateConfig(tolerance_mae=0.01, min_heldout=10)
    b = probe_budget(cand, base, 500, np.array([1, 2, 5]), 10, 3.0, gate, confidence=0.9, regression=0.02,
                     draws=400, seed=1)
    resampled = [p for p in b.points if not p.modelled]
    assert len(resampled) >= 5 and all(p.heldout_n >= 10 for p in resampled)
    for p in resampled:
        assert p.width == pytest.approx(p.width_formula, rel=0.15)
        assert abs(p.power - p.power_formula) < 0.09
    # a regression the gate tolerates is held no more often than a real one
    assert all(p.false_hold <= p.power for p in b.points)


def test_more_probes_narrow_the_interval_and_raise_the_power() -> None:
    cand, base = _night()
    b = probe_budget(cand, base, 500, np.array([1, 2, 5]), 10, 3.0, GateConfig(), seed=2)
    widths = [p.width for p in b.points]
    assert widths[0] > widths[-1] * 3
    assert b.points[-1].power_formula > b.points[0].power_formula
    assert [p.modelled for p in b.points] == [p.probes_per_night > 500 for p in b.points]
    today = [p for p in b.points if p.probes_per_night == 500]
    assert len(today) == 1 and today[0].heldout_n == len(cand)


def test_needed_count_reaches_the_target_power() -> None:
    """At the count the sentence names, the closed-form power is at least the target, and just below it
    is not (the count is the smallest)."""
    cand, base = _night(noise=0.8)
    gate = GateConfig(tolerance_mae=0.01, min_heldout=10)
    b = probe_budget(cand, base, 500, np.array([1]), 10, 3.0, gate, regression=0.02, power_target=0.8, seed=3)
    assert b.needed is not None and str(b.needed) in b.sentence()
    sd = float(np.std(cand - base))
    per_probe = len(cand) / 500

    def power(count: int) -> float:
        n = count * per_probe
        return float(stats.norm.sf((gate.tolerance_mae - 0.02) / (sd / math.sqrt(n))))

    assert power(b.needed) >= 0.8 - 1e-9
    assert power(b.needed - 2) < 0.8


def test_a_regression_within_tolerance_is_never_detected() -> None:
    cand, base = _night()
    b = probe_budget(cand, base, 500, np.array([1]), 10, 3.0, GateConfig(tolerance_mae=0.05), regression=0.02)
    assert b.needed is None and "tolerates" in b.sentence()


def test_below_min_heldout_the_gate_holds_everything() -> None:
    """Rule 1 of the gate: fewer held-out ratings than gate.min_heldout hold every candidate."""
    cand, base = _night(n=200)
    b = probe_budget(cand, base, 100, np.array([1]), 10, 3.0, GateConfig(min_heldout=50), fractions=(0.1, 1.0))
    small = b.points[0]
    assert small.heldout_n < 50 and small.power == 1.0 and small.false_hold == 1.0
    assert b.points[1].false_hold < 1.0


def test_own_share_is_the_expectation_of_thinning_the_real_history() -> None:
    """Keeping each stored own probe with chance f, the share with >= m left: the exact expectation
    (``scipy.stats.binom.sf``) against thinning the counts at random 5000 times."""
    counts = np.array([1, 2, 3, 4, 6, 8, 10, 15])
    active = 20
    rng = np.random.default_rng(0)
    simulated = (rng.binomial(counts[None, :], 0.5, size=(5000, len(counts))) >= 3).sum(axis=1).mean() / active
    assert own_share_thinned(counts, active, 3, 0.5) == pytest.approx(simulated, abs=0.005)
    assert own_share_thinned(counts, active, 3, 1.0) == pytest.approx(6 / 20)
    assert own_share_thinned(counts, active, 2.5, 1.0) == pytest.approx(6 / 20)     # m = 2.5 needs 3
    assert own_share_thinned(counts, active, 3, 2.0) > own_share_thinned(counts, active, 3, 1.0)


def test_above_the_resampling_cap_the_normal_limit_has_the_same_spread() -> None:
    """At the cap's size, resampling and the mean's normal limit N(mean, sd^2/n) give the same spread
    (2000 draws each: the sds' Monte Carlo error is about 1.6% each; allowed 7%, common practice)."""
    values, _ = _night()
    rng = np.random.default_rng(4)
    n = 20_000
    exact = np.std(resampled_means(values, n, 2000, rng, exact_up_to=n))
    limit = np.std(resampled_means(values, n, 2000, rng, exact_up_to=n - 1))
    assert limit == pytest.approx(exact, rel=0.07)


def test_without_a_baseline_the_difference_is_unpaired_and_said() -> None:
    cand, _ = _night()
    b = probe_budget(cand, None, 500, np.array([1]), 10, None, GateConfig(), seed=0)
    assert b.paired_with == "unpaired" and any("unpaired" in n for n in b.notes)
    assert all(math.isnan(p.own_share) for p in b.points)


def test_same_seed_same_curve() -> None:
    cand, base = _night()
    one = probe_budget(cand, base, 500, np.array([1, 4]), 10, 3.0, GateConfig(), seed=5).to_dict()
    two = probe_budget(cand, base, 500, np.array([1, 4]), 10, 3.0, GateConfig(), seed=5).to_dict()
    assert one == two


def test_too_few_heldout_ratings_are_refused() -> None:
    with pytest.raises(ValueError, match="at least two held-out"):
        probe_budget(np.array([0.5]), None, 10, np.array([]), 0, None, GateConfig())
