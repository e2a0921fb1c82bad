"""Error metrics and their percentile bootstrap intervals."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from tasks.engine.metrics import bootstrap_errors, mae, rmse, segmented_errors


def test_mae_and_rmse_by_hand() -> None:
    pred, y = np.array([1.0, 4.0, 3.0]), np.array([2.0, 2.0, 3.0])
    assert mae(pred, y) == pytest.approx(1.0)                     # (1 + 2 + 0) / 3
    assert rmse(pred, y) == pytest.approx(np.sqrt(5 / 3))         # sqrt((1 + 4 + 0) / 3)
    assert np.isnan(mae([], [])) and np.isnan(rmse([], []))


def test_bootstrap_intervals_match_scipy_percentile_bootstrap() -> None:
    rng = np.random.default_rng(0)
    y = rng.integers(1, 6, 2000).astype(float)
    pred = np.clip(y + rng.normal(0, 0.8, 2000), 1, 5)
    # 5,000 resamples of 2,000 ratings: more than one resampling block (4M indices) is used.
    ours = bootstrap_errors(pred, y, n_boot=5000, confidence=0.9, seed=1)
    assert ours["n"] == 2000 and ours["mae"] == mae(pred, y) and ours["rmse"] == rmse(pred, y)
    err = pred - y
    # Reference: scipy.stats.bootstrap, method="percentile", on the same errors (other random resamples).
    ref_mae = stats.bootstrap((np.abs(err),), np.mean, n_resamples=5000, confidence_level=0.9,
                              method="percentile", rng=np.random.default_rng(2)).confidence_interval
    ref_rmse = stats.bootstrap((err,), lambda e, axis: np.sqrt(np.mean(e ** 2, axis=axis)), n_resamples=5000,
                               confidence_level=0.9, method="percentile", rng=np.random.default_rng(3),
                               vectorized=True).confidence_interval
    # Both are Monte Carlo estimates of the same interval: ends within 10% of its width (common practice, no
    # source; the ends' Monte Carlo error at 5,000 resamples is about 2% of the width here).
    for lo, hi, ref in ((ours["mae_lo"], ours["mae_hi"], ref_mae), (ours["rmse_lo"], ours["rmse_hi"], ref_rmse)):
        width = ref.high - ref.low
        assert abs(lo - ref.low) < 0.1 * width and abs(hi - ref.high) < 0.1 * width, (lo, hi, ref)
        assert lo < hi


def test_no_interval_without_resamples_or_ratings() -> None:
    out = bootstrap_errors([3.0, 4.0], [3.0, 5.0], n_boot=0, confidence=0.9, seed=0)
    assert out["mae"] == 0.5 and np.isnan(out["mae_lo"]) and np.isnan(out["rmse_hi"])
    one = bootstrap_errors([3.0], [5.0], n_boot=100, confidence=0.9, seed=0)
    assert one["n"] == 1 and one["mae"] == 2.0 and np.isnan(one["mae_lo"])


def test_segments_are_the_overall_metrics_of_their_rows() -> None:
    pred, y = np.array([1.0, 2.0, 5.0, 4.0]), np.array([1.0, 4.0, 4.0, 4.0])
    out = segmented_errors(pred, y, ["up", "down", "up", "down"], n_boot=50, confidence=0.8, seed=3)
    assert set(out["segments"]) == {"down", "up"}
    assert out["segments"]["up"] == bootstrap_errors(pred[[0, 2]], y[[0, 2]], 50, 0.8, 3)
    assert out["segments"]["down"]["mae"] == 1.0 and out["mae"] == 0.75
