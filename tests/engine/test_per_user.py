"""Per-user debiasing: empirical-Bayes shrinkage and the per-user correction end to end through
``trainer.fit`` and a saved checkpoint. (The skew model's ridge: tests/engine/test_skew_model.py.)"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.per_user import SCALE_RANGE, shrinkage_strength
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit

torch.set_num_threads(1)


def test_shrinkage_strength_recovers_known_variances() -> None:
    # Hierarchical draw: user shift ~ N(0, tau^2 = 0.25), rating noise ~ N(0, sigma^2 = 1), 4 ratings each,
    # so the empirical-Bayes pseudo-count is sigma^2 / tau^2 = 4 (method of moments, common practice).
    rng = np.random.default_rng(3)
    users = np.repeat(np.arange(4000), 4)
    resid = rng.normal(0, 0.5, 4000)[users] + rng.normal(0, 1.0, len(users))
    m, sigma2, tau2 = shrinkage_strength(users, resid)
    assert sigma2 == pytest.approx(1.0, rel=0.05)
    assert tau2 == pytest.approx(0.25, rel=0.2)
    assert m == pytest.approx(4.0, rel=0.25)
    # No between-user variance at all: no own update (m infinite).
    flat = rng.normal(0, 1.0, len(users))
    assert np.isinf(shrinkage_strength(users, flat)[0]) or shrinkage_strength(users, flat)[0] > 50


def _world(seed: int = 0, n_users: int = 600, n_items: int = 200, probe_users: int = 400):
    """Synthetic truth with lover / hater / random users (as in the demo scenario), organic log, probes."""
    rng = np.random.default_rng(seed)
    P, Q = rng.normal(0, .6, (n_users, 4)), rng.normal(0, .6, (n_items, 4))
    truth = np.clip(np.rint(3 + rng.normal(0, .4, n_users)[:, None] + rng.normal(0, .5, n_items)[None, :]
                            + P @ Q.T), 1, 5)
    group = rng.choice(3, n_users, p=[.6, .15, .25])
    rows = []
    for u in range(n_users):
        a = (1.5, -1.5, 0.0)[group[u]]
        p = np.exp(a * (truth[u] - 3))
        for i in rng.choice(n_items, 25, replace=False, p=p / p.sum()):
            rows.append((f"m{u}", f"t{i}", truth[u, i]))
    organic = pd.DataFrame(rows, columns=["user_id", "item_id", "rating"])
    pr = [(f"m{u}", f"t{i}", truth[u, i]) for u in rng.choice(n_users, probe_users, replace=False)
          for i in rng.choice(n_items, 3, replace=False)]
    probe = pd.DataFrame(pr, columns=["user_id", "item_id", "rating"])
    tu, ti = rng.integers(0, n_users, 30000), rng.integers(0, n_items, 30000)
    return organic, probe, (tu, ti, truth[tu, ti], group[tu])


def _mar_mae(res, test) -> np.ndarray:
    tu, ti, y, g = test
    pred, _ = res.checkpoint.score([f"m{u}" for u in tu], [f"t{i}" for i in ti])
    return np.array([np.mean(np.abs(pred - y)[g == k]) for k in range(3)])


@pytest.fixture(scope="module")
def world():
    return _world()


@pytest.fixture(scope="module")
def cfg() -> Settings:
    return Settings().updated({"model.threads": 1, "model.max_epochs": 15})


def test_per_user_beats_plain_for_every_group_and_survives_save_load(world, cfg, tmp_path) -> None:
    organic, probe, test = world
    plain = fit(organic, probe, cfg.updated({"debias.method": "plain"}))
    res = fit(organic, probe, cfg)         # default: per_user, skew_affine
    ck = res.checkpoint
    assert ck.method == "per_user" and ck.info["per_user"]["design"] == "skew_affine"
    lo, hi = SCALE_RANGE
    assert ck.user_scale is not None and ck.user_scale.min() >= lo and ck.user_scale.max() <= hi
    m_plain, m_pu = _mar_mae(plain, test), _mar_mae(res, test)
    # Lovers (60%) and haters are skewed hard; random raters must not get worse beyond noise (0.02 stars).
    # Measured on this draw: lovers 0.45 -> 0.37, haters 0.39 -> 0.35, random 0.320 -> 0.325.
    assert m_pu[0] < m_plain[0] - 0.05 and m_pu[1] < m_plain[1] - 0.015, (m_plain, m_pu)
    assert m_pu[2] <= m_plain[2] + 0.02, (m_plain, m_pu)
    # A user's item order is kept (the correction is non-decreasing per user), so top-N lists agree.
    u = np.zeros(50, np.int64)
    raw = ck.raw_scores(u, np.arange(50))
    final = ck.finish(raw, u)
    assert np.all(np.diff(final[np.argsort(raw, kind="stable")]) >= -1e-12)
    ck.save(tmp_path / "ck")
    back = Checkpoint.load(tmp_path / "ck")
    ids = (["m1", "m7", "nobody"], ["t3", "t9", "t3"])
    np.testing.assert_array_equal(back.score(*ids)[0], ck.score(*ids)[0])


def test_few_probe_ratings_fall_back_to_the_offset_design(world, cfg) -> None:
    organic, probe, _ = world
    res = fit(organic, probe.iloc[:12], cfg)
    assert res.checkpoint.info["per_user"]["design"] == "offset"
    assert any("per_user_min_probes" in n for n in res.notes)
    none = fit(organic, probe.iloc[:0], cfg)
    assert any("no probe ratings" in n for n in none.notes)
    assert np.all(none.checkpoint.user_offset == 0)


def test_a_single_probe_rating_gives_finite_scores_for_every_user(world, cfg) -> None:
    # One probe rating in all: no noise variance can be measured (sigma^2 = 0), so the estimated m is 0.
    # Users without probe ratings must keep a finite offset (this once divided 0 by 0 and a first night
    # with one probe rating published NaN scores).
    organic, probe, _ = world
    for n in (1, 2):
        res = fit(organic, probe.iloc[:n], cfg)
        assert np.isfinite(res.checkpoint.user_offset).all()
        users = organic["user_id"].unique()
        scores, _ = res.checkpoint.score(users, np.full(len(users), organic["item_id"].iloc[0]))
        assert np.isfinite(scores).all()
