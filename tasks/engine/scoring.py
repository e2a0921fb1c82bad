"""Top-N recommendation lists from a checkpoint, in user blocks bounded by a memory budget.

Ranking uses raw factoriser scores: the post-processing (monotone map, per-user offset) is
non-decreasing within a user, so it cannot change a user's order; it is applied to the kept scores only.
"""

from __future__ import annotations

import numpy as np
import torch

from tasks.engine.checkpoint import Checkpoint


def users_per_block(n_items: int, budget_bytes: float) -> int:
    """Users scored at once by :func:`top_n`: a block of users x all items at 8 bytes a cell (the float32
    scores plus room for one float32 temporary of the same shape, e.g. the transposed factors' product
    in another :class:`~tasks.engine.model.Factoriser`) within the budget.
    Callers that split users across parallel tasks cut at multiples of this, so every block, and with it
    every float operation, is the same as in one serial call."""
    return max(1, int(budget_bytes // (8 * max(1, n_items))))


def top_n(ckpt: Checkpoint, user_idx: np.ndarray, exclude_u: np.ndarray, exclude_i: np.ndarray, n: int,
          budget_bytes: float = 256 * 2**20) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Best ``n`` items per user that the user has not rated.

    user_idx: ``[U]`` user indices; exclude_u/exclude_i: ``[E]`` already-rated pairs (indices).
    Returns flat arrays ``(user, item, score, rank)`` (indices, scale-units float32, 1-based int32),
    users in the given order, ranks ascending; fewer than ``n`` rows for a user who rated nearly all items.
    """
    user_idx = np.asarray(user_idx, np.int64)
    n_items = len(ckpt.items)
    k = min(n, n_items)
    if len(user_idx) == 0 or k == 0:
        empty = np.empty(0)
        return empty.astype(np.int64), empty.astype(np.int64), empty.astype(np.float32), empty.astype(np.int32)
    ex_u, ex_i = np.asarray(exclude_u), np.asarray(exclude_i)
    if len(ex_u) > 1 and not (ex_u[1:] >= ex_u[:-1]).all():    # the nightly shards come sorted
        order = np.argsort(ex_u, kind="stable")
        ex_u, ex_i = ex_u[order], ex_i[order]
    block = users_per_block(n_items, budget_bytes)
    outs = []
    items_all = torch.arange(n_items)
    with torch.no_grad():
        for s in range(0, len(user_idx), block):
            u = user_idx[s:s + block]
            # Ranked in the model's float32: float64 holds every float32 exactly, so order and ties are the
            # same, and only the kept k values per user are widened (a float64 copy of the whole block
            # was a third of the scoring time at 1M ratings).
            # Ranked without the per-user constant (mu + b_u): it cannot change a user's order and adding
            # it to every cell cost a pass over the block; it is added to the kept k values only.
            raw, user_const = ckpt.model.ranking_block(torch.from_numpy(u), items_all)
            # Mask rated items: locate each block user's excluded pairs via the sorted exclusion list.
            # searchsorted casts both sides to a common type: compare in ex_u's own (int32) type, or every
            # call would copy the whole exclusion list to int64
            uk = u.astype(np.int32) if ex_u.dtype == np.int32 and len(ckpt.users) < 2**31 else u
            lo, hi = np.searchsorted(ex_u, uk, "left"), np.searchsorted(ex_u, uk, "right")
            rows = np.repeat(np.arange(len(u)), hi - lo)
            cols = ex_i[np.concatenate([np.arange(a, b) for a, b in zip(lo, hi)])].astype(np.int64) if len(rows) \
                else np.empty(0, np.int64)
            raw[torch.from_numpy(rows), torch.from_numpy(cols)] = -np.inf
            vals, idx = torch.topk(raw, k, dim=1)
            vals, idx = (vals + user_const.view(-1, 1)).numpy(), idx.numpy()
            uu = np.repeat(u, k)
            keep = np.isfinite(vals.ravel())
            ranks = np.tile(np.arange(1, k + 1, dtype=np.int32), len(u))
            flat_u, flat_i, flat_raw = uu[keep], idx.ravel()[keep], vals.ravel()[keep].astype(np.float64)
            outs.append((flat_u, flat_i, ckpt.finish(flat_raw, flat_u).astype(np.float32), ranks[keep]))
    return tuple(np.concatenate(parts) for parts in zip(*outs))
