"""Probe error (shrunk per-user probe MAE), reference-user sampling and the cap on reference users per round."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from synthetic import mnar_logs

from tasks.engine.reference import cap_reference_users, draw_reference_users, probe_errors, reference_probabilities
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit


def test_probe_error_shrinkage_by_hand() -> None:
    # user 3: |errors| 1 and 0 (n=2, mae 0.5); user 8: |error| 2 (n=1, mae 2); population mean = 3/3 = 1.
    users = np.array([3, 8, 3])
    pred = np.array([4.0, 1.0, 2.0])
    rating = np.array([5.0, 3.0, 2.0])
    e = probe_errors(users, pred, rating, shrinkage=2.0)
    # (n*mae + m*mean)/(n+m): user 3 -> (2*0.5 + 2*1)/4 = 0.75 ; user 8 -> (1*2 + 2*1)/3 = 4/3
    assert list(e.index) == [3, 8]                    # users without probe ratings are absent
    assert e[3] == pytest.approx(0.75)
    assert e[8] == pytest.approx(4 / 3)
    raw = probe_errors(users, pred, rating, shrinkage=0.0)
    assert raw[3] == pytest.approx(0.5) and raw[8] == pytest.approx(2.0)
    assert probe_errors(np.array([], int), np.array([]), np.array([]), 5.0).empty


def test_reference_probabilities_are_clipped_exponentials() -> None:
    e = pd.Series([0.0, 0.3, 3.0], index=[0, 1, 2])
    p = reference_probabilities(e, temperature=0.3, p_min=0.01, p_max=0.9)
    np.testing.assert_allclose(p.to_numpy(), [0.9, np.exp(-1.0), 0.01])
    with pytest.raises(ValueError, match="reference_temperature"):
        reference_probabilities(e, temperature=0.0, p_min=0.0, p_max=1.0)


def test_reference_draw_frequencies_match_probabilities() -> None:
    errors = pd.Series([0.05, 0.2, 0.5, 1.0, 2.0], index=[4, 9, 11, 20, 21])
    p = reference_probabilities(errors, 0.4, 0.05, 0.8)
    rng = np.random.default_rng(42)
    draws = 4000
    counts = np.zeros(len(p))
    for _ in range(draws):
        counts[np.searchsorted(p.index.to_numpy(), draw_reference_users(p, rng))] += 1
    freq = pd.Series(counts / draws, index=p.index)
    se = np.sqrt(p * (1 - p) / draws)
    # Bernoulli(p_u) draws: frequency within 4 binomial standard errors (normal approximation; 4: common
    # practice, no source).
    assert (np.abs(freq - p) <= 4 * se).all(), pd.DataFrame({"freq": freq, "p": p})


def test_reference_draws_are_sorted_indices_and_differ_between_rounds() -> None:
    p = pd.Series(0.5, index=np.arange(100) * 3)
    rng = np.random.default_rng(0)
    a, b = draw_reference_users(p, rng), draw_reference_users(p, rng)
    assert (np.diff(a) > 0).all() and set(a) <= set(p.index)
    assert not np.array_equal(a, b)                    # resampled each round from one seeded stream
    assert draw_reference_users(pd.Series(dtype=float), rng).size == 0


def test_fit_resamples_references_and_records_their_share() -> None:
    logs = mnar_logs(n_users=120, n_items=40, per_user=10, probe_users=100, probes_per_user=4, seed=5)
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 5, "model.patience": 10,
                              "model.batch_size": 256, "debias.reference_temperature": 1.0})
    res = fit(logs.organic, logs.probe, cfg)
    n_with_error = res.probe_fit["user_id"].nunique()
    for r in res.rounds:
        assert r["reference_share"] == pytest.approx(r["reference_users"] / n_with_error)
        assert r["adjusted_users"] == logs.organic["user_id"].nunique() - r["reference_users"]
        assert 0 < r["reference_share"] < 1 and r["calibration"] == "on"
    counts = [r["reference_users"] for r in res.rounds]
    assert len(set(counts)) > 1, counts                # a fixed set would give the same count every round
    # Probe errors reported per user id, only for users with fitting-split probe ratings.
    assert set(res.probe_errors.index) == set(res.probe_fit["user_id"])


def test_reference_cap_leaves_small_rounds_alone():
    rng = np.random.default_rng(0)
    drawn = np.array([3, 8, 11])
    state = rng.bit_generator.state
    assert cap_reference_users(drawn, 3, rng) is drawn
    assert cap_reference_users(drawn, 0, rng) is drawn           # 0 = no cap
    assert rng.bit_generator.state == state                       # nothing drawn: rounds as without a cap


def test_reference_cap_is_a_uniform_sample():
    rng = np.random.default_rng(1)
    drawn = np.arange(100, 110)
    hits = np.zeros(10)
    for _ in range(3000):
        kept = cap_reference_users(drawn, 3, rng)
        assert len(kept) == 3 and len(set(kept)) == 3 and np.all(np.diff(kept) > 0) and set(kept) <= set(drawn)
        hits[kept - 100] += 1
    # Each user kept with chance 3/10; binomial sd over 3000 rounds is 0.0084 (common practice, no source: 4 sd).
    assert np.all(np.abs(hits / 3000 - 0.3) < 4 * 0.0084)
