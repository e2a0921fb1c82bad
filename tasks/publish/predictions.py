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
import pyarrow as pa

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.scoring import top_n, users_per_block


@dataclass
class ScoringShard:
    """Users of one scoring task and the (user, item) pairs they already rated (checkpoint indices)."""

    users: np.ndarray       # [U] int64
    exclude_u: np.ndarray   # [E] int32 (int64 beyond 2**31 rows), ascending
    exclude_i: np.ndarray   # [E] int32 likewise; a user's items ascending


def plan_shards(ckpt: Checkpoint, window: pd.DataFrame, budget_mb: float, shards: int = 1) -> list[ScoringShard]:
    """Active users of ``window`` (ascending by id, the published order) in at most ``shards`` shards,
    each a whole number of scoring blocks, with their rated pairs as exclusions."""
    # Distinct ids first, then sort them (np.unique over every row's id as a Python string took 21 s of a
    # 10M-rating night); the order is the same: ascending by id.
    users = np.sort(np.asarray(pd.unique(window["user_id"]), dtype=object))
    u_idx = ckpt.users.lookup(users)
    u_idx = u_idx[u_idx >= 0]
    block = users_per_block(len(ckpt.items), budget_mb * 2**20)
    n_blocks = -(-len(u_idx) // block)
    per_shard = block * max(1, -(-n_blocks // max(1, shards)))
    cuts = list(range(0, len(u_idx), per_shard)) or [0]
    # Each shard's rated pairs sorted by user (the order top_n reads them in, so it neither sorts nor
    # copies them; a user's items in any order: they are only masked). Users ranked by (shard, index):
    # one sort of (rank << 32 | item) packed in an int64 orders every shard at once. Memory: about 16
    # bytes a window rating at the peak (int32 lookups, the packed keys sorted in place); int64 lookups
    # and an int64 lexsort order held about 40.
    if len(ckpt.items) >= 2**32:
        raise ValueError(f"{len(ckpt.items)} items do not fit the 32 bits the scoring plan packs them in")
    in_shards = _narrow(np.concatenate([np.sort(u_idx[s:s + per_shard]) for s in cuts]) if len(u_idx) else u_idx)
    rank = np.full(len(ckpt.users), -1, np.int64)
    rank[in_shards] = np.arange(len(in_shards))
    ex_u = ckpt.users.lookup(window["user_id"], small=True)
    ex_i = ckpt.items.lookup(window["item_id"], small=True)
    ok = (ex_u >= 0) & (ex_i >= 0)
    if not ok.all():
        ex_u, ex_i = ex_u[ok], ex_i[ok]
    del ok
    ex_i_type = ex_i.dtype            # int32 unless the items need more
    packed = rank[ex_u]
    del ex_u
    keep = packed >= 0                  # pairs of users in no shard (none when the window made the list)
    if not keep.all():
        packed, ex_i = packed[keep], ex_i[keep]
    del keep
    packed <<= 32
    packed |= ex_i
    del ex_i
    packed.sort()
    # Shifted and masked straight into 32-bit outputs (casting='unsafe': the values fit), so no int64
    # temporary of every pair is made next to the packed keys.
    ranks = np.right_shift(packed, 32, out=np.empty(len(packed), np.int32 if len(in_shards) < 2**31 else np.int64),
                           casting="unsafe")
    sizes = [len(u_idx[s:s + per_shard]) for s in cuts]
    bounds = np.searchsorted(ranks, np.cumsum([0] + sizes))    # shard k: its users' ranks, contiguous
    ex_u = in_shards[ranks]
    del ranks
    ex_i = np.bitwise_and(packed, 0xFFFFFFFF, out=np.empty(len(packed), ex_i_type), casting="unsafe")
    del packed
    return [ScoringShard(u_idx[s:s + per_shard], ex_u[bounds[k]:bounds[k + 1]], ex_i[bounds[k]:bounds[k + 1]])
            for k, s in enumerate(cuts)]


def _narrow(idx: np.ndarray) -> np.ndarray:
    """Checkpoint rows as int32 when they fit (a shard's rated pairs), else int64."""
    return idx.astype(np.int32) if not len(idx) or int(idx.max()) < 2**31 else idx.astype(np.int64, copy=False)


def score_shard(ckpt: Checkpoint, shard: ScoringShard, n: int, budget_mb: float
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Top ``n`` unrated items of each shard user: flat ``(user, item, score, rank)`` arrays (indices,
    float32 scale units, 1-based int32), users in shard order."""
    return top_n(ckpt, shard.users, shard.exclude_u, shard.exclude_i, n, budget_mb * 2**20)


def assemble(ckpt: Checkpoint, parts: list[tuple[np.ndarray, ...]]) -> pd.DataFrame:
    """Frame with schemas.PREDICTIONS columns from the shards' results, in plan order (user then rank)."""
    def joined(k: int) -> np.ndarray:           # one output column at a time: the others are not held meanwhile
        return np.concatenate([p[k] for p in parts])

    users = _id_column(ckpt.users.ids, joined(0))
    items = _id_column(ckpt.items.ids, joined(1))
    return pd.DataFrame({"user_id": users, "item_id": items, "score": joined(2).astype(np.float32, copy=False),
                         "rank": joined(3).astype(np.int32, copy=False)}, copy=False)


def _id_column(ids: pd.Index, rows: np.ndarray):
    """``ids[rows]`` as the column pandas makes of text (its Arrow-backed ``str`` type under pandas 3).

    Built by an Arrow ``take`` from the distinct ids: a Python string reference per published row, which
    pandas then turned into Arrow text, peaked at about 200 bytes a row (3.6 GB for 18M rows at 100M
    ratings). Same column, same Parquet bytes. Where pandas keeps text as objects, objects it is."""
    text = pd.Series(np.array(["x"], dtype=object)).dtype
    if not (isinstance(text, pd.StringDtype) and text.storage == "pyarrow"):
        return ids[rows].to_numpy(dtype=object)
    distinct = pa.array(ids.to_numpy(dtype=object), pa.large_string())
    return pd.array(distinct.take(pa.array(rows)), dtype=text)


def build_predictions(ckpt: Checkpoint, window: pd.DataFrame, n: int, budget_mb: float) -> pd.DataFrame:
    """All three steps in this process (one shard). Frame with schemas.PREDICTIONS columns, sorted by
    user then rank."""
    return assemble(ckpt, [score_shard(ckpt, s, n, budget_mb) for s in plan_shards(ckpt, window, budget_mb)])
