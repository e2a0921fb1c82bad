"""Per-user correction of the prediction map, learned from each user's own probe ratings.

After the global monotone map ``f`` is fitted, user u's offset is the shrunk mean probe residual

    delta_u = sum_j (y_uj - f(raw_uj)) / (n_u + prior)

i.e. the posterior mean of a per-user shift under a zero-mean Gaussian prior worth ``prior``
pseudo-ratings (empirical Bayes), so a user with one or two probe ratings moves only a little.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..config import DebiasConfig, ScaleConfig


def fit_offsets(ckpt, organic: pd.DataFrame, probe_fit: pd.DataFrame, debias: DebiasConfig,
                scale: ScaleConfig) -> np.ndarray:
    """Offsets ``[n_users]`` (rating units) for ``ckpt``; zero for users without probe ratings."""
    n_users = len(ckpt.users)
    offset = np.zeros(n_users)
    if probe_fit.empty:
        return offset
    u = ckpt.users.lookup(probe_fit["user_id"])
    i = ckpt.items.lookup(probe_fit["item_id"])
    mapped = ckpt.score_map(ckpt.raw_scores(u, i))
    resid = probe_fit["rating"].to_numpy(float) - mapped
    sums = np.bincount(u, weights=resid, minlength=n_users)
    counts = np.bincount(u, minlength=n_users)
    offset = sums / (counts + debias.per_user_prior) if debias.per_user_prior > 0 else \
        np.divide(sums, counts, out=np.zeros(n_users), where=counts > 0)
    return offset
