"""The skew model: per-user features of organic rating behaviour and the ridge regression (leave-one-out
choice of strength) that predicts a user's probe residual from them."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
from synthetic import random_biased_mf

from tasks.engine.skew_model import (FEATURE_NAMES, OrganicRows, fit_ridge, standardise, user_features,
                                     user_mean_prediction)


def test_ridge_without_penalty_matches_least_squares() -> None:
    rng = np.random.default_rng(0)
    X = np.hstack([np.ones((200, 1)), rng.normal(size=(200, 4))])
    y = X @ np.array([0.5, 1.0, -2.0, 0.0, 0.3]) + rng.normal(0, 0.1, 200)
    got = fit_ridge(X, y, grid=(1e-14,))
    # Reference: numpy.linalg.lstsq (ordinary least squares).
    ref = np.linalg.lstsq(X, y, rcond=None)[0]
    np.testing.assert_allclose(got.coef, ref, atol=1e-8)


def test_ridge_leave_one_out_error_matches_refitting() -> None:
    rng = np.random.default_rng(1)
    X = np.hstack([np.ones((40, 1)), rng.normal(size=(40, 3))])
    y = X @ np.array([1.0, 0.5, 0.0, -0.5]) + rng.normal(0, 0.5, 40)
    rel = 0.1
    got = fit_ridge(X, y, grid=(rel,))
    # Reference: the definition of leave-one-out error, by refitting the same ridge 40 times.
    lam = rel * len(y)   # the strength the closed form used for the full data
    pen = np.eye(4)
    pen[0, 0] = 0
    errs = []
    for k in range(len(y)):
        keep = np.arange(len(y)) != k
        coef = np.linalg.solve(X[keep].T @ X[keep] + lam * pen, X[keep].T @ y[keep])
        errs.append((y[k] - X[k] @ coef) ** 2)
    assert got.loo_mse == pytest.approx(float(np.mean(errs)), rel=1e-9)


def test_ridge_falls_back_to_a_constant_when_features_carry_nothing() -> None:
    rng = np.random.default_rng(2)
    X = np.hstack([np.ones((12, 1)), rng.normal(size=(12, 8))])
    y = rng.normal(0.3, 1.0, 12)                 # independent of X, few rows, many features
    got = fit_ridge(X, y)
    pred = got.predict(X)
    assert np.ptp(pred) < 0.35 * np.std(y)       # nearly flat: leave-one-out error chose heavy shrinkage
    assert pred.mean() == pytest.approx(y.mean(), abs=0.1)


def test_user_mean_prediction_is_the_mean_over_every_item() -> None:
    model, _ = random_biased_mf(7, 30, 4, 3.2, 0.6, seed=1)
    with torch.no_grad():
        # Reference: every user x item prediction, averaged.
        brute = model.predict_block(torch.arange(7), torch.arange(30)).double().mean(1).numpy()
    np.testing.assert_allclose(user_mean_prediction(model), brute, rtol=0, atol=1e-5)


def test_user_features_by_hand() -> None:
    model, _ = random_biased_mf(4, 6, 2, 3.0, 0.5, seed=3)
    # User 0: 5, 5, 4 (rates what they love); user 1: 1, 2; user 2: one 3; user 3: no organic rating.
    u = np.array([0, 0, 0, 1, 1, 2])
    i = np.array([0, 1, 2, 3, 4, 5])
    r = np.array([5.0, 5.0, 4.0, 1.0, 2.0, 3.0])
    f = pd.DataFrame(user_features(model, OrganicRows(u, i, r), 1.0, 5.0, 1.0), columns=FEATURE_NAMES)
    item_ref = 3.0 + model.item_bias.weight.detach().double().numpy()[:, 0]
    np.testing.assert_allclose(f["mean_rating"], [14 / 3 - 3, 1.5 - 3, 0.0, 0.0])
    np.testing.assert_allclose(f["mean_vs_item"][:3], [np.mean(r[:3] - item_ref[:3]), np.mean(r[3:5] - item_ref[3:5]),
                                                       r[5] - item_ref[5]])
    np.testing.assert_allclose(f["spread"], [np.std([5, 5, 4]), 0.5, 0.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(f["top_share"], [2 / 3, 0, 0, 0])
    np.testing.assert_allclose(f["bottom_share"], [0, 0.5, 0, 0])
    np.testing.assert_allclose(f["log_activity"], np.log1p([3, 2, 1, 0]))
    np.testing.assert_array_equal(f["no_organic"], [0, 0, 0, 1])
    np.testing.assert_allclose(f["user_bias"], model.user_bias.weight.detach().double().numpy()[:, 0])


def test_features_kept_between_refits_follow_the_model_and_the_user_count() -> None:
    """Training refits the correction every round on one OrganicRows: what it keeps (the rating-only
    features) must not carry one model's state into the next model's features."""
    u, i = np.array([0, 0, 1, 2, 2, 2], np.int32), np.array([0, 1, 1, 2, 3, 0], np.int32)
    r = np.array([5.0, 4.0, 1.0, 3.0, 3.0, 2.0])
    kept = OrganicRows(u, i, r)
    for seed, users in ((1, 4), (2, 4), (3, 6)):
        model, _ = random_biased_mf(users, 5, 2, 3.0, 0.5, seed=seed)
        fresh = user_features(model, OrganicRows(u.astype(np.int64), i.astype(np.int64), r), 1.0, 5.0, 1.0)
        again = user_features(model, kept, 1.0, 5.0, 1.0)
        assert again.shape == (users, len(FEATURE_NAMES))
        np.testing.assert_array_equal(again, fresh)      # the same bits, int32 rows or int64


def test_standardise_gives_unit_columns_and_zero_for_constant_ones() -> None:
    rng = np.random.default_rng(4)
    x = np.column_stack([rng.normal(5, 3, 200), np.full(200, 7.0), rng.uniform(0, 1, 200)])
    z = standardise(x)
    np.testing.assert_allclose(z.mean(0), 0, atol=1e-12)
    np.testing.assert_allclose(z.std(0), [1, 0, 1], atol=1e-12)
    assert np.all(z[:, 1] == 0)
