"""A small seeded generator of selection-skewed (MNAR) rating logs for engine tests.

Invented scenario data (see the glossary's demo): members of a library reading app rate titles 1-5 stars.
A dense matrix of true ratings comes from a low-rank biased model; each member belongs to a "rates what
they love", "rates what they hate" or "rates at random" group and picks which titles to rate with
probabilities tilted by the true rating (organic ratings, MNAR). A random probe asks some members to
rate uniformly random titles (probe ratings, MAR). All numbers are invented.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd


@dataclass
class SyntheticLogs:
    organic: pd.DataFrame          # user_id, item_id, rating (MNAR)
    probe: pd.DataFrame            # user_id, item_id, rating (MAR)
    truth: np.ndarray              # [n_users, n_items] true ratings on the 1-5 scale
    user_ids: np.ndarray           # [n_users] object, index -> "member-000123"
    item_ids: np.ndarray           # [n_items] object, index -> "title-004567"


def user_id(k: int) -> str:
    return f"member-{k:06d}"


def item_id(k: int) -> str:
    return f"title-{k:06d}"


def mnar_logs(n_users: int = 150, n_items: int = 60, per_user: int = 12, probe_users: int = 100,
              probes_per_user: int = 4, dim: int = 3, tilt: float = 1.5, seed: int = 0) -> SyntheticLogs:
    """Seeded logs; sizes are small so a test trains in well under a second per epoch."""
    rng = np.random.default_rng(seed)
    P = rng.normal(0, 0.6, (n_users, dim))
    Q = rng.normal(0, 0.6, (n_items, dim))
    bu, bi = rng.normal(0, 0.4, n_users), rng.normal(0, 0.5, n_items)
    truth = np.clip(np.rint(3 + bu[:, None] + bi[None, :] + P @ Q.T), 1, 5)
    group_tilt = np.array([tilt, -tilt, 0.0])[rng.choice(3, n_users, p=[0.6, 0.15, 0.25])]
    logits = group_tilt[:, None] * (truth - 3)
    # Gumbel top-k = sampling per_user items without replacement with probabilities ~ exp(logits).
    keys = logits + rng.gumbel(size=truth.shape)
    picked = np.argsort(-keys, axis=1)[:, :per_user]
    users = np.repeat(np.arange(n_users), per_user)
    items = picked.ravel()
    uid = np.array([user_id(k) for k in range(n_users)], dtype=object)
    iid = np.array([item_id(k) for k in range(n_items)], dtype=object)
    organic = pd.DataFrame({"user_id": uid[users], "item_id": iid[items], "rating": truth[users, items]})
    pu = np.repeat(rng.choice(n_users, probe_users, replace=False), probes_per_user)
    pi = np.concatenate([rng.choice(n_items, probes_per_user, replace=False) for _ in range(probe_users)]
                        + [np.empty(0, dtype=np.int64)])
    probe = pd.DataFrame({"user_id": uid[pu], "item_id": iid[pi], "rating": truth[pu, pi]})
    return SyntheticLogs(organic=organic, probe=probe, truth=truth, user_ids=uid, item_ids=iid)


def random_biased_mf(n_users: int, n_items: int, dim: int, global_mean: float, init_scale: float,
                     seed: int):
    """A ``BiasedMF`` with random factors and N(0, 1) user and item biases (fresh models have zero
    biases, which would hide bias-handling mistakes). Returns ``(model, generator)``."""
    import torch

    from tasks.engine.model import BiasedMF

    g = torch.Generator().manual_seed(seed)
    m = BiasedMF(n_users, n_items, dim, global_mean, init_scale, g)
    with torch.no_grad():
        m.user_bias.weight.normal_(0, 1, generator=g)
        m.item_bias.weight.normal_(0, 1, generator=g)
    return m, g
