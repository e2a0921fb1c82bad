"""Propensities and inverse-propensity estimators for MNAR ratings.

Naive Bayes propensity of observing a rating given its value (Schnabel et al. 2016, ICML,
"Recommendations as Treatments: Debiasing Learning and Evaluation"):

    P(O=1 | r) = P(r | O=1) * P(O=1) / P(r)

with ``P(r | O=1)`` from organic ratings, ``P(r)`` from MAR probe ratings and ``P(O=1)`` the observed
share of the user x item matrix. Estimators of the mean error over *all* pairs from observed pairs:
IPS ``(1/N) sum_obs e/p`` and self-normalised SNIPS ``sum_obs e/p / sum_obs 1/p``.
"""

from __future__ import annotations

import numpy as np


def _histogram(values: np.ndarray, levels: np.ndarray, smoothing: float) -> np.ndarray:
    idx = np.abs(np.asarray(values, float)[:, None] - levels[None, :]).argmin(axis=1)
    counts = np.bincount(idx, minlength=len(levels)).astype(float) + smoothing
    return counts / counts.sum()


def naive_bayes_propensity(organic: np.ndarray, probe: np.ndarray, levels: np.ndarray,
                           observed_share: float, smoothing: float = 1.0) -> np.ndarray:
    """``P(O=1 | r = levels[j])`` for each rating level, shape ``[L]``.

    Ratings are binned to the nearest level; Laplace ``smoothing`` keeps empty levels finite.
    """
    if len(probe) == 0:
        raise ValueError("naive Bayes propensities need probe ratings (P(r) comes from them)")
    if len(organic) == 0:
        raise ValueError("naive Bayes propensities need organic ratings")
    levels = np.asarray(levels, float)
    p_r_given_o = _histogram(organic, levels, smoothing)
    p_r = _histogram(probe, levels, smoothing)
    return p_r_given_o * observed_share / p_r


def rating_weights(ratings: np.ndarray, levels: np.ndarray, propensity: np.ndarray, clip: float) -> np.ndarray:
    """Inverse-propensity weight of each observed rating, normalised to mean 1.

    Propensities are clipped below at ``clip * max(propensity)`` (variance control); normalising only
    rescales the loss, so the minimiser is the same as with raw 1/p.
    """
    p = np.maximum(np.asarray(propensity, float), clip * float(np.max(propensity)))
    idx = np.abs(np.asarray(ratings, float)[:, None] - np.asarray(levels, float)[None, :]).argmin(axis=1)
    w = 1.0 / p[idx]
    return w / w.mean()


def ips_estimate(errors: np.ndarray, propensities: np.ndarray, n_total: int) -> float:
    """IPS estimate of the mean error over ``n_total`` pairs from the observed pairs' errors."""
    return float(np.sum(np.asarray(errors, float) / np.asarray(propensities, float)) / n_total)


def snips_estimate(errors: np.ndarray, propensities: np.ndarray) -> float:
    """Self-normalised IPS estimate of the mean error."""
    inv = 1.0 / np.asarray(propensities, float)
    return float(np.sum(np.asarray(errors, float) * inv) / np.sum(inv))
