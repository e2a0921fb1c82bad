"""IPS / SNIPS estimators and naive Bayes propensities on synthetic data with known propensities.

Outside reference for every check here: Schnabel, Swaminathan, Singh, Chandak & Joachims (2016), ICML,
"Recommendations as Treatments: Debiasing Learning and Evaluation": IPS is unbiased for the mean error
over all pairs when propensities are correct, SNIPS is its self-normalised, consistent variant, and the
naive Bayes estimator P(O=1|r) = P(r|O=1) P(O=1) / P(r) with P(r) from MAR data recovers
rating-dependent propensities. (Section numbers are not given: recalled, not checked.)

Tolerances use the normal approximation of a mean or a share over many draws: common practice (no
source); 3.3 rounds up the two-sided 99.9% normal quantile, scipy.stats.norm.ppf(0.9995) = 3.29.
"""

from __future__ import annotations

import numpy as np
import pytest

from tasks.engine.propensity import ips_estimate, naive_bayes_propensity, rating_weights, snips_estimate

LEVELS = np.arange(1.0, 6.0)
#: Invented rating-dependent chance of a pair being rated: extremes are rated more (MNAR).
TRUE_P = np.array([0.10, 0.03, 0.02, 0.06, 0.20])


def _world(seed: int = 0, n_pairs: int = 20_000):
    rng = np.random.default_rng(seed)
    r = rng.choice(LEVELS, n_pairs, p=[0.1, 0.2, 0.35, 0.25, 0.1])
    # A predictor whose error depends on the true rating (worse on the extremes), so the naive average of
    # errors over rated pairs is biased toward the extremes' error.
    pred = np.clip(r + rng.normal(0, 0.3, n_pairs) + 0.6 * (3 - r) / 2, 1, 5)
    err = np.abs(pred - r)
    return rng, r, err


def test_ips_and_snips_are_unbiased_for_the_mar_error() -> None:
    rng, r, err = _world()
    p = TRUE_P[(r - 1).astype(int)]
    true_mar = err.mean()
    draws = 400
    ips, snips, naive = np.empty(draws), np.empty(draws), np.empty(draws)
    for k in range(draws):
        obs = rng.random(len(r)) < p
        ips[k] = ips_estimate(err[obs], p[obs], len(r))
        snips[k] = snips_estimate(err[obs], p[obs])
        naive[k] = err[obs].mean()
    for name, est in (("ips", ips), ("snips", snips)):
        se = est.std(ddof=1) / np.sqrt(draws)
        # Schnabel et al. 2016: E[IPS] = true mean error; SNIPS bias is O(1/n) (~1,700 rated pairs per draw),
        # far below this interval. 99.9% normal interval of the mean over draws (z = 3.3, see above).
        assert abs(est.mean() - true_mar) <= 3.3 * se, (name, est.mean(), true_mar, se)
    # The naive mean over rated pairs misses by many standard errors: the check above has power.
    assert abs(naive.mean() - true_mar) > 20 * naive.std(ddof=1) / np.sqrt(draws)


def test_naive_bayes_recovers_rating_dependent_propensities() -> None:
    rng, r, _ = _world(seed=1, n_pairs=200_000)
    obs = rng.random(len(r)) < TRUE_P[(r - 1).astype(int)]
    organic = r[obs]
    probe = r[rng.choice(len(r), 8_000, replace=False)]       # MAR: uniformly random pairs
    est = naive_bayes_propensity(organic, probe, LEVELS, obs.mean())
    # Schnabel et al. 2016's naive Bayes estimator; tolerance 12% relative (~4 standard errors of P(r) from
    # 8,000 probe ratings at the rarest level; 4 standard errors: common practice, no source).
    np.testing.assert_allclose(est, TRUE_P, rtol=0.12)


def test_naive_bayes_needs_both_samples() -> None:
    with pytest.raises(ValueError, match="probe"):
        naive_bayes_propensity(np.array([1.0, 5.0]), np.array([]), LEVELS, 0.1)
    with pytest.raises(ValueError, match="organic"):
        naive_bayes_propensity(np.array([]), np.array([3.0]), LEVELS, 0.1)


def test_rating_weights_clip_and_normalise() -> None:
    ratings = np.array([1.0, 3.0, 3.0, 5.0])
    prop = np.array([0.001, 0.5, 0.1, 0.5, 1.0])
    w = rating_weights(ratings, LEVELS, prop, clip=0.05)
    assert w.mean() == pytest.approx(1.0)
    # rating 1: propensity 0.001 clipped up to 0.05 * max = 0.05 -> raw weight 20; rating 3: 10; rating 5: 1.
    np.testing.assert_allclose(w / w[-1], [20.0, 10.0, 10.0, 1.0])
