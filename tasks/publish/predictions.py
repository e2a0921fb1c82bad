"""Published predictions: top-N unrated items for every user active in the training window.

Three steps so the scoring can run in parallel on the flow's task runner (``flows/runners.py``):
:func:`plan_shards` splits the active users into shards, :func:`score_shard` ranks one shard,
:func:`assemble` joins the shards in plan order. Shards are cut at multiples of the scoring block
(:func:`tasks.engine.scoring.users_per_block`), so each block's arithmetic is exactly what one serial
call computes: the result is identical whatever the number of shards or workers.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.scoring import top_n, users_per_block


@dataclass
class ScoringShard:
    """Users of one scoring task and the (user, item) pairs they already rated (checkpoint indices)."""

    users: np.ndarray       # [U] int64
    exclude_u: np.ndarray   # [E] int32 (int64 beyond 2**31 rows), ascending
    exclude_i: np.ndarray   # [E] int32 likewise


def plan_shards(ckpt: Checkpoint, window: pd.DataFrame, budget_mb: float, shards: int = 1) -> list[ScoringShard]:
    """Active users of ``window`` (ascending by id, the published order) in at most ``shards`` shards,
    each a whole number of scoring blocks, with their rated pairs as exclusions."""
    # Distinct ids first, then sort them (np.unique over every row's id as a Python string took 21 s of a
    # 10M-rating night); the order is the same: ascending by id.
    users = np.sort(np.asarray(pd.unique(window["user_id"]), dtype=object))
    u_idx = ckpt.users.lookup(users)
    u_idx = u_idx[u_idx >= 0]
    ex_u, ex_i = ckpt.users.lookup(window["user_id"]), ckpt.items.lookup(window["item_id"])
    ok = (ex_u >= 0) & (ex_i >= 0)
    if not ok.all():
        ex_u, ex_i = ex_u[ok], ex_i[ok]
    del ok
    block = users_per_block(len(ckpt.items), budget_mb * 2**20)
    n_blocks = -(-len(u_idx) // block)
    per_shard = block * max(1, -(-n_blocks // max(1, shards)))
    cuts = list(range(0, len(u_idx), per_shard)) or [0]
    shard_of = np.full(len(ckpt.users), -1, np.int16 if len(cuts) < 2**15 else np.int64)
    for k, s in enumerate(cuts):
        shard_of[u_idx[s:s + per_shard]] = k
    # Each shard's pairs sorted by user, a user's pairs in window order (stable): the order top_n reads
    # them in, so it needs no sort and no copy of its own. Memory: the window's pairs are held once, as
    # int32, next to one int64 ordering (a sort per shard and int64 copies held them about three times).
    ex_shard = shard_of[ex_u]
    order = np.lexsort((ex_u, ex_shard))
    bounds = np.searchsorted(ex_shard[order], np.arange(len(cuts) + 1))
    del ex_shard
    out = []
    for k, s in enumerate(cuts):
        sel = order[bounds[k]:bounds[k + 1]]
        out.append(ScoringShard(u_idx[s:s + per_shard], _index32(ex_u, sel), _index32(ex_i, sel)))
    return out


def _index32(idx: np.ndarray, sel: np.ndarray) -> np.ndarray:
    """``idx[sel]`` as int32 when the values fit (checkpoint rows of one shard's rated pairs)."""
    out = idx[sel]
    return out.astype(np.int32) if not len(out) or int(out.max()) < 2**31 else out


def score_shard(ckpt: Checkpoint, shard: ScoringShard, n: int, budget_mb: float
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Top ``n`` unrated items of each shard user: flat ``(user, item, score, rank)`` arrays (indices,
    float32 scale units, 1-based int32), users in shard order."""
    return top_n(ckpt, shard.users, shard.exclude_u, shard.exclude_i, n, budget_mb * 2**20)


def assemble(ckpt: Checkpoint, parts: list[tuple[np.ndarray, ...]]) -> pd.DataFrame:
    """Frame with schemas.PREDICTIONS columns from the shards' results, in plan order (user then rank)."""
    u, i, score, rank = (np.concatenate(x) for x in zip(*parts))
    return pd.DataFrame({"user_id": ckpt.users.ids[u].to_numpy(dtype=object),
                         "item_id": ckpt.items.ids[i].to_numpy(dtype=object),
                         "score": score.astype(np.float32), "rank": rank.astype(np.int32)})


def build_predictions(ckpt: Checkpoint, window: pd.DataFrame, n: int, budget_mb: float) -> pd.DataFrame:
    """All three steps in this process (one shard). Frame with schemas.PREDICTIONS columns, sorted by
    user then rank."""
    return assemble(ckpt, [score_shard(ckpt, s, n, budget_mb) for s in plan_shards(ckpt, window, budget_mb)])
