"""Error metrics with bootstrap confidence intervals (plain numpy).

All errors are in rating units (stars). Intervals are percentile bootstrap intervals over ratings.
"""

from __future__ import annotations

import numpy as np


def mae(pred: np.ndarray, y: np.ndarray) -> float:
    return float(np.mean(np.abs(np.asarray(pred, float) - np.asarray(y, float)))) if len(y) else float("nan")


def rmse(pred: np.ndarray, y: np.ndarray) -> float:
    return float(np.sqrt(np.mean((np.asarray(pred, float) - np.asarray(y, float)) ** 2))) if len(y) else float("nan")


def bootstrap_errors(pred: np.ndarray, y: np.ndarray, n_boot: int, confidence: float, seed: int) -> dict:
    """MAE and RMSE with percentile bootstrap intervals.

    Returns ``{"n", "mae", "mae_lo", "mae_hi", "rmse", "rmse_lo", "rmse_hi"}``; bounds are NaN when
    ``n_boot == 0`` or fewer than two ratings.
    """
    err = np.asarray(pred, float) - np.asarray(y, float)
    n = len(err)
    out = {"n": int(n), "mae": mae(pred, y), "rmse": rmse(pred, y),
           "mae_lo": float("nan"), "mae_hi": float("nan"), "rmse_lo": float("nan"), "rmse_hi": float("nan")}
    if n_boot <= 0 or n < 2:
        return out
    rng = np.random.default_rng(seed)
    abs_err, sq_err = np.abs(err), err**2
    maes = np.empty(n_boot)
    rmses = np.empty(n_boot)
    # Resample in blocks so memory stays bounded by ~4M indices at a time.
    block = max(1, 4_000_000 // n)
    for start in range(0, n_boot, block):
        stop = min(n_boot, start + block)
        idx = rng.integers(0, n, size=(stop - start, n))
        maes[start:stop] = abs_err[idx].mean(axis=1)
        rmses[start:stop] = np.sqrt(sq_err[idx].mean(axis=1))
    a = (1 - confidence) / 2
    out["mae_lo"], out["mae_hi"] = (float(v) for v in np.quantile(maes, [a, 1 - a]))
    out["rmse_lo"], out["rmse_hi"] = (float(v) for v in np.quantile(rmses, [a, 1 - a]))
    return out


def segmented_errors(pred, y, segments, n_boot: int, confidence: float, seed: int) -> dict:
    """:func:`bootstrap_errors` overall plus one entry per segment label under ``"segments"``."""
    pred, y, segments = np.asarray(pred, float), np.asarray(y, float), np.asarray(segments, dtype=object)
    out = bootstrap_errors(pred, y, n_boot, confidence, seed)
    out["segments"] = {str(s): bootstrap_errors(pred[segments == s], y[segments == s], n_boot, confidence, seed)
                       for s in sorted(set(segments.tolist()))}
    return out
