"""Predicting a user's selection skew from how they rate organically (plain numpy).

A user's organic ratings are selection-skewed; their probe ratings are not. Users who have probe ratings
show how far the model's predictions sit from the truth *for a user who rates organically like them*.
This module turns each user's organic behaviour into a small feature vector and fits a ridge regression
from it to the probe residual, so users with few or no probe ratings still get a correction.

Features per user (all from the organic log and the trained factoriser; shape ``[n_users, 9]``):

====  ============================================================================================
0     mean organic rating, minus the middle of the scale
1     mean of (organic rating - the item's average-user score ``mu + b_i``): skew relative to items
2     standard deviation of the user's organic ratings (a user who rates only what they love has little)
3     share of organic ratings on the top level of the scale
4     share on the bottom level
5     ``log(1 + number of organic ratings)``: activity
6     the model's user bias ``b_u``
7     the user's mean predicted score over all items, minus ``mu`` (exact, O(users x dim))
8     1 when the user has no organic rating (probe-only users), else 0
====  ============================================================================================

Features are standardised over users; a constant column stays zero. Regression rows are single probe
ratings, so a user with three probe ratings weighs three times one with one.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

FEATURE_NAMES = ("mean_rating", "mean_vs_item", "spread", "top_share", "bottom_share", "log_activity",
                 "user_bias", "mean_prediction", "no_organic")

#: Ridge strengths tried, as a multiple of the number of regression rows (chosen by leave-one-out error).
RIDGE_GRID = tuple(10.0 ** k for k in range(-4, 3))


def user_mean_prediction(model) -> np.ndarray:
    """Each user's mean raw score over all items, ``[n_users]`` float64.

    For biased MF the mean over items is ``mu + b_u + mean(b_i) + p_u . mean(q_i)``: exact without
    touching users x items.
    """
    with torch.no_grad():
        q_mean = model.item_factors.weight.double().mean(0)
        b_i = float(model.item_bias.weight.double().mean())
        p = model.user_factors.weight.double()
        b_u = model.user_bias.weight.double().squeeze(-1)
        return (float(model.global_mean) + b_u + b_i + p @ q_mean).numpy()


class OrganicRows:
    """A run's organic ratings as model rows: ``users`` [N], ``items`` [N] (integer row indices, int32 or
    int64) and ``ratings`` [N] (float64, scale units).

    The features that depend on the ratings alone (counts, means, spread, top and bottom shares) are
    computed once per user count and kept: training refits the correction every round, and recomputing
    them there held several window-sized temporaries (and two fresh id lookups) each time."""

    def __init__(self, users: np.ndarray, items: np.ndarray, ratings: np.ndarray) -> None:
        self.users, self.items, self.ratings = users, items, np.asarray(ratings, float)
        self._fixed: tuple[int, tuple, np.ndarray] | None = None

    @classmethod
    def lookup(cls, organic, user_map, item_map) -> "OrganicRows":
        """From a frame with ``user_id``, ``item_id``, ``rating`` and the id maps of a checkpoint."""
        return cls(user_map.lookup(organic["user_id"], small=True), item_map.lookup(organic["item_id"], small=True),
                   organic["rating"].to_numpy(float))

    def fixed_features(self, n_users: int, scale_min: float, scale_max: float, step: float) -> np.ndarray:
        """Features 0, 2, 3, 4, 5 and 8 and the per-user counts ``[n_users, 7]`` (cached)."""
        key = (scale_min, scale_max, step)
        if self._fixed is not None and self._fixed[0] == n_users and self._fixed[1] == key:
            return self._fixed[2]
        u, r = self.users, self.ratings
        cnt = np.bincount(u, minlength=n_users).astype(float)
        has = cnt > 0
        safe = np.maximum(cnt, 1.0)

        def mean_of(v: np.ndarray) -> np.ndarray:
            return np.bincount(u, weights=v, minlength=n_users) / safe

        mid = (scale_min + scale_max) / 2
        # Top / bottom level: within half a step of the ends (a tenth of the range on a continuous scale).
        edge = step / 2 if step > 0 else (scale_max - scale_min) / 10
        mean = mean_of(r)
        spread = np.sqrt(np.maximum(mean_of(r * r) - mean**2, 0.0))
        fixed = np.column_stack([np.where(has, mean - mid, 0.0), np.where(has, spread, 0.0),
                                 mean_of((r >= scale_max - edge).astype(float)),
                                 mean_of((r <= scale_min + edge).astype(float)),
                                 np.log1p(cnt), (~has).astype(float), cnt])
        self._fixed = (n_users, key, fixed)
        return fixed


def user_features(model, organic: OrganicRows, scale_min: float, scale_max: float, step: float) -> np.ndarray:
    """Raw (unstandardised) features ``[n_users, 9]`` of ``organic`` under ``model``."""
    n_users = model.user_bias.num_embeddings
    fixed = organic.fixed_features(n_users, scale_min, scale_max, step)
    cnt = fixed[:, 6]
    has = cnt > 0
    with torch.no_grad():
        item_ref = (float(model.global_mean) + model.item_bias.weight.double().squeeze(-1).numpy())
        b_u = model.user_bias.weight.double().squeeze(-1).numpy()
    # r - item_ref[i], in place of the gathered column: one window-sized temporary instead of two.
    gap = item_ref[organic.items]
    np.subtract(organic.ratings, gap, out=gap)
    vs_item = np.bincount(organic.users, weights=gap, minlength=n_users) / np.maximum(cnt, 1.0)
    del gap
    return np.column_stack([fixed[:, 0], np.where(has, vs_item, 0.0), fixed[:, 1], fixed[:, 2], fixed[:, 3],
                            fixed[:, 4], b_u, user_mean_prediction(model) - float(model.global_mean), fixed[:, 5]])


def standardise(features: np.ndarray) -> np.ndarray:
    """Zero mean, unit variance per column over users; constant columns become 0."""
    mu = features.mean(0)
    sd = features.std(0)
    return np.where(sd > 1e-12, (features - mu) / np.where(sd > 1e-12, sd, 1.0), 0.0)


@dataclass
class RidgeFit:
    coef: np.ndarray        # [P] including the (unpenalised) intercept at index 0
    strength: float         # chosen ridge strength (absolute)
    loo_mse: float          # leave-one-out mean squared error at that strength
    null_mse: float         # leave-one-out error of the intercept-only model

    def predict(self, design: np.ndarray) -> np.ndarray:
        return design @ self.coef


def fit_ridge(design: np.ndarray, target: np.ndarray, grid: tuple[float, ...] = RIDGE_GRID) -> RidgeFit:
    """Ridge regression with an unpenalised intercept (column 0 of ``design`` must be ones).

    The strength is picked from ``grid`` (multiples of the row count) by exact leave-one-out error
    (``e_i / (1 - h_ii)``, the closed form for linear smoothers), so with few probe ratings the fit falls
    back toward the intercept by itself. design: ``[N, P]``; target: ``[N]``.
    """
    X = np.asarray(design, float)
    y = np.asarray(target, float)
    n, p = X.shape
    if n == 0:
        raise ValueError("fit_ridge: no rows")
    null_mse = float(np.mean((y - y.mean()) ** 2) * (n / max(n - 1, 1)) ** 2)
    penalty = np.eye(p)
    penalty[0, 0] = 0.0
    gram, xty = X.T @ X, X.T @ y
    best: RidgeFit | None = None
    for rel in grid:
        lam = rel * n
        a = gram + lam * penalty
        try:
            inv = np.linalg.inv(a)
        except np.linalg.LinAlgError:
            continue
        coef = inv @ xty
        h = np.einsum("ij,jk,ik->i", X, inv, X)
        resid = (y - X @ coef) / np.maximum(1.0 - h, 1e-6)
        loo = float(np.mean(resid**2))
        if best is None or loo < best.loo_mse - 1e-12:
            best = RidgeFit(coef, lam, loo, null_mse)
    if best is None or best.loo_mse >= null_mse:
        coef = np.zeros(p)
        coef[0] = y.mean()
        return RidgeFit(coef, float("inf"), null_mse, null_mse)
    return best
