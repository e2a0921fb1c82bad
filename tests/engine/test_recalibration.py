"""The monotone map of post-hoc recalibration (MonotoneMap): isotonic regression, applied by interpolation."""

from __future__ import annotations

import numpy as np
import pytest

from tasks.engine.recalibration import MonotoneMap


def _pool_adjacent_violators(y: np.ndarray) -> np.ndarray:
    """Reference: least-squares non-decreasing fit of ``y`` (in the given order) by pooling adjacent
    violators (Barlow et al. 1972, "Statistical Inference under Order Restrictions"), written out here
    independently of scipy's implementation, which MonotoneMap uses."""
    blocks: list[list[float]] = []                 # [mean, count] per pooled block
    for v in y:
        blocks.append([float(v), 1.0])
        while len(blocks) > 1 and blocks[-2][0] > blocks[-1][0]:
            m2, c2 = blocks.pop()
            m1, c1 = blocks.pop()
            blocks.append([(m1 * c1 + m2 * c2) / (c1 + c2), c1 + c2])
    return np.concatenate([np.full(int(c), m) for m, c in blocks])


def test_a_small_fit_by_hand() -> None:
    # Sorted by prediction the targets are 3, 2, 1, 5: the first three violate order and pool to 2.
    f = MonotoneMap.fit(np.array([2.0, 1.0, 4.0, 3.0]), np.array([2.0, 3.0, 5.0, 1.0]))
    np.testing.assert_array_equal(f.x, [1.0, 2.0, 3.0, 4.0])
    np.testing.assert_allclose(f.y, [2.0, 2.0, 2.0, 5.0])


@pytest.mark.parametrize("seed", range(5))
def test_knots_are_the_isotonic_regression_of_the_targets(seed: int) -> None:
    rng = np.random.default_rng(seed)
    pred = rng.uniform(1, 5, 150)                                     # distinct, fewer than max_knots
    target = np.clip(np.rint(pred + rng.normal(0, 1.2, 150)), 1, 5)
    f = MonotoneMap.fit(pred, target)
    order = np.argsort(pred)
    np.testing.assert_array_equal(f.x, pred[order])
    np.testing.assert_allclose(f.y, _pool_adjacent_violators(target[order]), rtol=0, atol=1e-12)
    np.testing.assert_allclose(f(pred[order]), f.y, rtol=0, atol=1e-12)     # at the knots it is the fit


def test_output_is_non_decreasing_with_ties_and_many_points() -> None:
    rng = np.random.default_rng(7)
    pred = np.round(rng.normal(3, 1, 5000), 1)                        # many ties
    target = np.clip(np.rint(pred + rng.normal(0, 1.0, 5000)), 1, 5)
    f = MonotoneMap.fit(pred, target, max_knots=50)
    assert len(f.x) <= 50 and np.all(np.diff(f.x) > 0)               # at most max_knots, strictly ordered
    grid = np.linspace(-2, 8, 2001)
    assert np.all(np.diff(f(grid)) >= 0)
    assert np.all(np.diff(f.y) >= 0)


def test_interpolates_between_knots_and_stays_flat_beyond_them() -> None:
    f = MonotoneMap(np.array([1.0, 3.0, 4.0]), np.array([2.0, 2.5, 4.5]))
    np.testing.assert_allclose(f(np.array([2.0, 3.5])), [2.25, 3.5])   # linear between knots
    np.testing.assert_array_equal(f(np.array([-10.0, 0.99, 4.01, 99.0])), [2.0, 2.0, 4.5, 4.5])


@pytest.mark.parametrize("n", [0, 1])
def test_fewer_than_two_points_give_the_identity(n: int) -> None:
    f = MonotoneMap.fit(np.arange(n, dtype=float), np.full(n, 4.0))
    x = np.array([-1.0, 2.5, 7.0])
    np.testing.assert_array_equal(f(x), x)
    np.testing.assert_array_equal(MonotoneMap()(x), x)
    assert f.to_dict() == {"x": [], "y": []}


def test_dict_round_trip() -> None:
    f = MonotoneMap.fit(np.array([1.0, 2.0, 3.0, 4.0]), np.array([1.0, 3.0, 2.0, 4.0]))
    back = MonotoneMap.from_dict(f.to_dict())
    x = np.linspace(0, 5, 11)
    np.testing.assert_array_equal(back(x), f(x))
    np.testing.assert_array_equal(MonotoneMap.from_dict(None)(x), x)
