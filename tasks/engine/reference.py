"""Probe error and reference-user sampling (plain numpy).

probe error e_u: the user's MAE on their probe ratings under the current model, shrunk toward the
population probe MAE: ``(n_u * mae_u + m * mean) / (n_u + m)``. Users with no probe rating have none.
Each training round, a user with a probe error is a reference user with probability
``p_u = clip(exp(-e_u / tau), p_min, p_max)``, drawn as independent Bernoulli trials.
"""

from __future__ import annotations

import numpy as np
import pandas as pd


def probe_errors(user_idx: np.ndarray, pred: np.ndarray, rating: np.ndarray, shrinkage: float) -> pd.Series:
    """Shrunk per-user probe MAE, indexed by user index (int); only users with probe ratings appear."""
    if len(rating) == 0:
        return pd.Series(dtype=float)
    abs_err = np.abs(np.asarray(pred, float) - np.asarray(rating, float))
    df = pd.DataFrame({"u": user_idx, "e": abs_err})
    g = df.groupby("u", sort=True)["e"].agg(["sum", "count"])
    population = float(abs_err.mean())
    shrunk = (g["sum"] + shrinkage * population) / (g["count"] + shrinkage)
    shrunk.index.name = "user"
    return shrunk


def reference_probabilities(errors: pd.Series, temperature: float, p_min: float, p_max: float) -> pd.Series:
    if temperature <= 0:
        raise ValueError(f"reference_temperature must be positive, got {temperature}")
    return np.exp(-errors / temperature).clip(p_min, p_max)


def draw_reference_users(probabilities: pd.Series, rng: np.random.Generator) -> np.ndarray:
    """Indices (the Series index) of users drawn as reference users this round, sorted."""
    if probabilities.empty:
        return np.empty(0, dtype=np.int64)
    hit = rng.random(len(probabilities)) < probabilities.to_numpy()
    return np.sort(probabilities.index.to_numpy()[hit].astype(np.int64))


def cap_reference_users(drawn: np.ndarray, cap: int, rng: np.random.Generator) -> np.ndarray:
    """At most ``cap`` of the ``drawn`` reference users: a uniform sample without replacement, sorted.

    Returns ``drawn`` itself (and draws nothing from ``rng``) when ``cap`` is 0 or not exceeded, so rounds
    under the cap are exactly what they were without one. A uniform sample of a Bernoulli draw is still a
    draw in which lower probe error means a higher chance; every reference user keeps the same chance of
    being in the sample.
    """
    if cap <= 0 or len(drawn) <= cap:
        return drawn
    return np.sort(rng.choice(drawn, cap, replace=False))
