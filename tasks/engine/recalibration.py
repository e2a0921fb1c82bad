"""Post-hoc recalibration: a monotone map from predicted rating to probe rating.

Fitted by isotonic regression (``scipy.optimize.isotonic_regression``) on the probe fitting split;
applied by linear interpolation between fitted knots, flat beyond them.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import isotonic_regression


class MonotoneMap:
    """x -> y non-decreasing map; identity when empty."""

    def __init__(self, knots_x: np.ndarray | None = None, knots_y: np.ndarray | None = None) -> None:
        self.x = np.asarray([] if knots_x is None else knots_x, float)
        self.y = np.asarray([] if knots_y is None else knots_y, float)

    @classmethod
    def fit(cls, pred: np.ndarray, target: np.ndarray, max_knots: int = 200) -> "MonotoneMap":
        pred, target = np.asarray(pred, float), np.asarray(target, float)
        if len(pred) < 2:
            return cls()
        order = np.argsort(pred, kind="stable")
        fitted = isotonic_regression(target[order], increasing=True).x
        xs = pred[order]
        # Collapse to at most ``max_knots`` quantile knots: the checkpoint stays small and the map smooth.
        q = np.unique(np.linspace(0, len(xs) - 1, min(max_knots, len(xs))).round().astype(int))
        kx, ky = xs[q], fitted[q]
        kx, first = np.unique(kx, return_index=True)
        return cls(kx, ky[first])

    def __call__(self, pred: np.ndarray) -> np.ndarray:
        if len(self.x) == 0:
            return np.asarray(pred, float)
        return np.interp(np.asarray(pred, float), self.x, self.y)

    def to_dict(self) -> dict:
        return {"x": self.x.tolist(), "y": self.y.tolist()}

    @classmethod
    def from_dict(cls, d: dict | None) -> "MonotoneMap":
        return cls() if not d else cls(np.asarray(d["x"]), np.asarray(d["y"]))
