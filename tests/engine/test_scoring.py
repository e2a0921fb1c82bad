"""Top-N lists from a checkpoint: the best unrated items per user, whatever the block size."""

from __future__ import annotations

import numpy as np
import torch
from synthetic import mnar_logs, random_biased_mf

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.idmap import IdMap
from tasks.engine.scoring import top_n, users_per_block
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit

torch.set_num_threads(1)


def test_top_n_matches_brute_force_over_every_unrated_item() -> None:
    logs = mnar_logs(n_users=40, n_items=30, per_user=6, probe_users=20, probes_per_user=3, seed=6)
    cfg = Settings().updated({"debias.method": "per_user", "model.max_epochs": 3})
    ckpt = fit(logs.organic, logs.probe, cfg).checkpoint
    ex_u, ex_i = ckpt.users.lookup(logs.organic["user_id"]), ckpt.items.lookup(logs.organic["item_id"])
    users = np.array([0, 7, 13, 39])
    got_u, got_i, got_s, got_r = top_n(ckpt, users, ex_u, ex_i, n=5, budget_bytes=8 * 30 * 3)  # blocks of 3 users
    rated = set(zip(ex_u.tolist(), ex_i.tolist()))
    for u in users:
        # Reference: a plain loop scoring every unrated item with Checkpoint.score_idx and sorting.
        cand = np.array([i for i in range(len(ckpt.items)) if (u, i) not in rated])
        full = ckpt.score_idx(np.full(len(cand), u), cand)
        best = cand[np.argsort(-full, kind="stable")[:5]]
        mine = got_i[got_u == u]
        assert np.array_equal(got_r[got_u == u], np.arange(1, len(mine) + 1))
        np.testing.assert_allclose(got_s[got_u == u], np.sort(full)[::-1][:5], rtol=0, atol=1e-5)
        assert set(mine) == set(best) or np.allclose(np.sort(full)[::-1][4], np.sort(full)[::-1][5], atol=1e-5)


def _checkpoint(n_users: int = 12, n_items: int = 9) -> Checkpoint:
    model, _ = random_biased_mf(n_users, n_items, 3, 3.0, 0.8, seed=2)
    return Checkpoint(model=model, users=IdMap([f"member-{k:06d}" for k in range(n_users)]),
                      items=IdMap([f"title-{k:06d}" for k in range(n_items)]), scale_min=1.0, scale_max=5.0,
                      method="plain")


def test_users_per_block_is_the_budget_over_eight_bytes_per_item() -> None:
    assert users_per_block(1000, 8 * 1000 * 25) == 25
    assert users_per_block(1000, 8 * 1000 * 25 - 1) == 24
    assert users_per_block(10**9, 1.0) == 1                      # always at least one user
    assert users_per_block(0, 80.0) == 10                        # no items: one cell per user


def test_blocks_change_nothing_and_rated_items_never_come_back() -> None:
    ckpt = _checkpoint()
    rng = np.random.default_rng(0)
    ex_u, ex_i = rng.integers(0, 12, 40), rng.integers(0, 9, 40)
    users = np.array([11, 0, 5, 7, 3])                          # any order: kept in the output
    whole = top_n(ckpt, users, ex_u, ex_i, n=4)
    for budget in (8 * 9, 8 * 9 * 2, 8 * 9 * 3):                  # blocks of 1, 2 and 3 users
        for a, b in zip(top_n(ckpt, users, ex_u, ex_i, n=4, budget_bytes=budget), whole):
            np.testing.assert_array_equal(a, b)
    got_u, got_i = whole[0], whole[1]
    assert list(dict.fromkeys(got_u.tolist())) == users.tolist()
    assert not set(zip(got_u.tolist(), got_i.tolist())) & set(zip(ex_u.tolist(), ex_i.tolist()))


def test_more_asked_than_items_and_no_users() -> None:
    ckpt = _checkpoint()
    u, i, s, r = top_n(ckpt, np.array([4]), np.array([4, 4]), np.array([0, 1]), n=50)
    assert sorted(i.tolist()) == list(range(2, 9)) and r.tolist() == list(range(1, 8))   # 9 items - 2 rated
    assert np.all(np.diff(s) <= 0)
    empty = top_n(ckpt, np.array([], dtype=np.int64), np.array([0]), np.array([0]), n=5)
    assert all(len(x) == 0 for x in empty)
