"""Distribution statistics checked against reference libraries and worked examples.

Demo ids follow the invented library-app scenario (members rate titles 1-5 stars); all numbers are
invented.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import jensenshannon

from tasks.config import ScaleConfig
from tasks.monitor.distributions import (
    bin_index,
    chi2_homogeneity,
    histogram,
    js_divergence,
    ks_two_sample,
    night_noise_se,
    population_stability_index,
    profile_movement,
    rating_bin_edges,
    skew_summary,
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
    # PSI = sum (a - e) ln(a / e) over bins, with a, e the bin shares: the name and the use for drift are
    # common practice in credit scoring (no source). It is the symmetrised Kullback-Leibler divergence
    # KL(a || e) + KL(e || a), checked against scipy.stats.entropy (reference library function) below.
    # live (expected) counts 20/30/50 -> shares .2/.3/.5; candidate (actual) 30/30/40 -> .3/.3/.4
    #   bin 1: (0.3 - 0.2) ln(0.3/0.2) = 0.1 * 0.405465 = 0.0405465
    #   bin 2: 0
    #   bin 3: (0.4 - 0.5) ln(0.4/0.5) = -0.1 * -0.223144 = 0.0223144
    #   total = 0.0628609
    assert population_stability_index([30, 30, 40], [20, 30, 50]) == pytest.approx(0.0628609, abs=1e-6)
    # symmetric in its arguments (each term is)
    assert population_stability_index([20, 30, 50], [30, 30, 40]) == pytest.approx(0.0628609, abs=1e-6)
    a, e = np.array([0.3, 0.3, 0.4]), np.array([0.2, 0.3, 0.5])
    assert population_stability_index([30, 30, 40], [20, 30, 50]) == pytest.approx(
        stats.entropy(a, e) + stats.entropy(e, a), rel=1e-12)
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
        # 400 draws estimate a standard deviation to about +-4% (1 / sqrt(2 * 400), the normal-theory
        # standard error of a standard deviation: from memory); allow 20% (common practice, no source)
        assert se[k] == pytest.approx(np.std(draws[k]), rel=0.2), k


def test_profile_movement():
    a = np.array([[0.1, 0.5, 0.9], [0.0, 0.2, 0.4]])
    b = np.array([[0.1, 0.4, 0.6], [0.0, 0.2, 0.4]])
    np.testing.assert_allclose(profile_movement(a, b), [(0 + 0.1 + 0.3) / 3, 0.0])
    with pytest.raises(ValueError, match="one shape"):
        profile_movement(a, b[:, :2])
