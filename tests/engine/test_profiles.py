"""Rating profiles: the soft CDF, its chunked all-item form and its sampled (unbiased) estimate."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from tasks.engine.model import BiasedMF
from tasks.engine.profiles import empirical_cdf, soft_cdf, soft_cdf_chunked, thresholds

torch.set_num_threads(1)


def test_thresholds_span_the_scale_inclusive() -> None:
    t = thresholds(1.0, 5.0, 9, dtype=torch.float64)
    # Reference: numpy.linspace (evenly spaced, both ends included).
    np.testing.assert_allclose(t.numpy(), np.linspace(1.0, 5.0, 9))


@pytest.mark.parametrize("sharpness, tol", [(0.1, 0.15), (1e-3, 2e-3), (1e-5, 1e-9)])
def test_soft_cdf_tends_to_the_exact_empirical_cdf(sharpness: float, tol: float) -> None:
    rng = np.random.default_rng(3)
    pred = rng.uniform(0.5, 5.5, (4, 500))
    t = thresholds(1.0, 5.0, 12, dtype=torch.float64)
    soft = soft_cdf(torch.from_numpy(pred), t, sharpness).numpy()
    # Reference: exact ECDF from sorted values, numpy.searchsorted(side="right") = #{x <= t} (numpy docs).
    exact = np.stack([np.searchsorted(np.sort(row), t.numpy(), side="right") / row.size for row in pred])
    err = np.abs(soft - exact).max()
    assert err <= tol
    if sharpness == 0.1:
        assert err > 1e-3   # a wide sigmoid is visibly smooth: the limit above is not trivially met


def test_soft_cdf_is_a_cdf() -> None:
    pred = torch.randn(6, 40, generator=torch.Generator().manual_seed(0)) + 3
    F = soft_cdf(pred, thresholds(1, 5, 10), 0.2)
    assert F.shape == (6, 10)
    assert (F >= 0).all() and (F <= 1).all()
    assert (F[:, 1:] >= F[:, :-1]).all()


def test_empirical_cdf_matches_numpy() -> None:
    v = torch.tensor([1.0, 2.0, 2.0, 3.0, 5.0])
    t = thresholds(1, 5, 5)
    # Reference: numpy.searchsorted on the sorted sample (side="right" counts ties at t as <= t).
    expected = np.searchsorted(np.sort(v.numpy()), t.numpy(), side="right") / 5
    np.testing.assert_allclose(empirical_cdf(v, t).numpy(), expected)
    with pytest.raises(ValueError, match="empty"):
        empirical_cdf(torch.empty(0), t)


def _model(n_users: int = 30, n_items: int = 97) -> BiasedMF:
    g = torch.Generator().manual_seed(1)
    m = BiasedMF(n_users, n_items, 4, 3.0, 0.8, g)
    with torch.no_grad():
        m.item_bias.weight.normal_(0, 0.7, generator=g)
        m.user_bias.weight.normal_(0, 0.5, generator=g)
    return m


@pytest.mark.parametrize("budget_bytes", [1, 5_000, 60_000, 1e9])
def test_chunked_all_item_profile_equals_unchunked(budget_bytes: float) -> None:
    m = _model()
    users = torch.tensor([0, 3, 7, 11, 29])
    t = thresholds(1, 5, 10)
    with torch.no_grad():
        full = soft_cdf(m.predict_block(users, torch.arange(m.n_items)), t, 0.1)
    chunked = soft_cdf_chunked(m.predict_block, users, m.n_items, t, 0.1, budget_bytes)
    torch.testing.assert_close(chunked, full, rtol=0, atol=1e-6)


@pytest.mark.parametrize("shared", [False, True], ids=["per-user-sample", "shared-sample"])
def test_sampled_profile_is_unbiased(shared: bool) -> None:
    """The mean over a uniform item sample is unbiased for the mean over all items.

    Training uses one sample shared by a step's users (``predict_block``), reference profiles an
    independent sample per user (``predict_sampled``); both must be unbiased per user.
    """
    m = _model()
    users = torch.tensor([2, 5])
    t = thresholds(1, 5, 10, dtype=torch.float32)

    def one(g: torch.Generator) -> torch.Tensor:
        if shared:
            return m.predict_block(users, torch.randint(0, m.n_items, (16,), generator=g))
        return m.predict_sampled(users, torch.randint(0, m.n_items, (2, 16), generator=g))

    with torch.no_grad():
        exact = soft_cdf(m.predict_block(users, torch.arange(m.n_items)), t, 0.1).double().numpy()
        g = torch.Generator().manual_seed(123)
        draws = 2000
        est = np.stack([soft_cdf(one(g), t, 0.1).double().numpy() for _ in range(draws)])
    mean, se = est.mean(axis=0), est.std(axis=0, ddof=1) / np.sqrt(draws)
    # Check against a normal-theory 99.9% interval around the mean of the draws (|z| < 3.3, rounding up
    # scipy.stats.norm.ppf(0.9995) = 3.29; the normal approximation: common practice, no source), with a tiny
    # absolute slack for float32 rounding where the sample variance is ~0 (thresholds at the scale ends).
    z_ok = np.abs(mean - exact) <= 3.3 * se + 1e-5
    assert z_ok.all(), np.abs(mean - exact) / np.maximum(se, 1e-12)
    # One sample is clearly noisy, so the check above has something to average out.
    assert np.abs(est[0] - exact).max() > 0.01
