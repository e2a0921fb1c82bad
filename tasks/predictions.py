"""Published predictions: top-N unrated items for every user active in the training window."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .engine.checkpoint import Checkpoint
from .engine.scoring import top_n


def build_predictions(ckpt: Checkpoint, window: pd.DataFrame, n: int, budget_mb: float) -> pd.DataFrame:
    """Frame with schemas.PREDICTIONS columns, sorted by user then rank."""
    users = np.unique(window["user_id"].to_numpy(dtype=object)).astype(object)
    u_idx = ckpt.users.lookup(users)
    u_idx = u_idx[u_idx >= 0]
    ex_u, ex_i = ckpt.users.lookup(window["user_id"]), ckpt.items.lookup(window["item_id"])
    ok = (ex_u >= 0) & (ex_i >= 0)
    u, i, score, rank = top_n(ckpt, u_idx, ex_u[ok], ex_i[ok], n, budget_mb * 2**20)
    return pd.DataFrame({"user_id": ckpt.users.ids[u].to_numpy(dtype=object),
                         "item_id": ckpt.items.ids[i].to_numpy(dtype=object),
                         "score": score.astype(np.float32), "rank": rank.astype(np.int32)})
