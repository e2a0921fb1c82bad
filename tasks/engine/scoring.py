"""Top-N recommendation lists from a checkpoint, in user blocks bounded by a memory budget.

Ranking uses raw factoriser scores: the post-processing (monotone map, per-user offset) is
non-decreasing within a user, so it cannot change a user's order; it is applied to the kept scores only.
"""

from __future__ import annotations

from dataclasses import dataclass

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


#: Title groups by factor norm for the bound (more groups: tighter bounds, more bookkeeping per block).
NORM_GROUPS = 32


@dataclass
class ScoringStats:
    """What exact top-N skipped: cells (users x titles) scored and skipped, users whose list needed
    every title (ties at the list's edge or too few candidates)."""

    cells_scored: int = 0
    cells_skipped: int = 0
    users_full: int = 0

    @property
    def skipped_share(self) -> float:
        total = self.cells_scored + self.cells_skipped
        return self.cells_skipped / total if total else 0.0


class _Bound:
    """Titles ordered for the bound ``b_i + |p_u| |q_i|`` on ``b_i + <p_u, q_i>``: ``NORM_GROUPS`` groups of
    titles by norm (each with its largest norm), titles in a group sorted by ``b_i`` descending. Then a
    user's titles that can reach ``theta`` are, in every group, a prefix (one searchsorted per group)."""

    def __init__(self, item_factors: torch.Tensor, item_part: torch.Tensor) -> None:
        q = item_factors.detach().double().numpy()
        self.b = item_part.detach().double().numpy()
        self.norm = np.sqrt((q * q).sum(1))
        by_norm = np.argsort(self.norm, kind="stable")
        self.groups = [g for g in np.array_split(by_norm, min(NORM_GROUPS, len(by_norm))) if len(g)]
        self.group_items, self.group_neg_b, self.group_norm = [], [], []
        for g in self.groups:
            o = g[np.argsort(-self.b[g], kind="stable")]
            self.group_items.append(o)
            self.group_neg_b.append(-self.b[o])
            self.group_norm.append(float(self.norm[g].max()))

    def candidates(self, user_norm: np.ndarray, theta: np.ndarray) -> np.ndarray:
        """Titles (ascending) whose bound reaches ``theta`` for at least one user of the block; ``user_norm``
        and ``theta`` are ``[B]``. The bound is widened by a relative 1e-4 (plus 1e-6): far more than the
        float32 rounding of a ``d``-term dot product, so a title whose computed score reaches ``theta`` is
        never left out."""
        picked = []
        for items, neg_b, n in zip(self.group_items, self.group_neg_b, self.group_norm):
            reach = user_norm * n
            # b_i + reach + slack >= theta  <=>  -b_i <= reach + slack - theta, with slack over |b_i| <= max
            slack = 1e-4 * (np.abs(neg_b).max() + reach) + 1e-6
            counts = np.searchsorted(neg_b, reach + slack - theta, side="right")
            picked.append(items[:int(counts.max())])
        return np.sort(np.concatenate(picked))


def _mask_excluded(raw: torch.Tensor, u: np.ndarray, cols: np.ndarray | None, ex_u: np.ndarray,
                   ex_i: np.ndarray) -> None:
    """Set ``raw[r, c] = -inf`` where block user ``u[r]`` rated title ``cols[c]`` (``cols`` None: column c is
    title c). ``ex_u`` sorted ascending, ``ex_i`` aligned."""
    lo, hi = np.searchsorted(ex_u, u, "left"), np.searchsorted(ex_u, u, "right")
    rows = np.repeat(np.arange(len(u)), hi - lo)
    if not len(rows):
        return
    titles = ex_i[np.concatenate([np.arange(a, b) for a, b in zip(lo, hi)])]
    if cols is not None:
        at = np.minimum(np.searchsorted(cols, titles), len(cols) - 1)
        hit = cols[at] == titles
        rows, titles = rows[hit], at[hit]
    raw[torch.from_numpy(rows), torch.from_numpy(titles)] = -np.inf


def top_n(ckpt: Checkpoint, user_idx: np.ndarray, exclude_u: np.ndarray, exclude_i: np.ndarray, n: int,
          budget_bytes: float = 256 * 2**20, prune: bool = False, stats: ScoringStats | None = None
          ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Best ``n`` items per user that the user has not rated.

    user_idx: ``[U]`` user indices; exclude_u/exclude_i: ``[E]`` already-rated pairs (indices).
    Returns flat arrays ``(user, item, score, rank)`` (indices, scale-units float32, 1-based int32),
    users in the given order, ranks ascending; fewer than ``n`` rows for a user who rated nearly all items.

    ``prune`` (off; when the model offers :meth:`~tasks.engine.model.Factoriser.ranking_bound_parts`): skip
    titles that cannot enter a user's list. Per block of users, the titles with the highest
    ``b_i + mean|p_u| |q_i|`` are scored first; the ``n``-th best of them is a floor ``theta_u`` for each
    user's list, and a title whose bound ``b_i + |p_u| |q_i|`` stays below every block user's floor is
    never scored. The scored titles go through the same ``addmm`` and ``topk`` as the dense path; a user
    whose list has equal scores side by side (where ``topk``'s order among equals could depend on the
    other columns) or too few candidates is scored over every title. Not on by default: the BLAS may
    round ``addmm`` over a subset of the columns differently from the whole block (a different kernel
    for another shape), so a published score can differ in its last bit from today's (seen once in
    ``bench/fingerprints.py``: one night's predictions of the ``recalibrate`` setting), and today's lists
    are the contract. ``stats`` (optional) counts what was skipped.
    """
    user_idx = np.asarray(user_idx, np.int64)
    n_items = len(ckpt.items)
    k = min(n, n_items)
    if len(user_idx) == 0 or k == 0:
        empty = np.empty(0)
        return empty.astype(np.int64), empty.astype(np.int64), empty.astype(np.float32), empty.astype(np.int32)
    order = np.argsort(exclude_u, kind="stable")
    ex_u, ex_i = np.asarray(exclude_u, np.int64)[order], np.asarray(exclude_i, np.int64)[order]
    block = users_per_block(n_items, budget_bytes)
    parts = ckpt.model.ranking_bound_parts() if prune else None
    bound = _Bound(parts[1], parts[2]) if parts is not None and k < n_items else None
    stats = stats if stats is not None else ScoringStats()
    outs = []
    items_all = torch.arange(n_items)
    with torch.no_grad():
        for s in range(0, len(user_idx), block):
            u = user_idx[s:s + block]
            if bound is None:
                vals, idx, user_const = _dense_block(ckpt, u, items_all, ex_u, ex_i, k)
                stats.cells_scored += len(u) * n_items
            else:
                vals, idx, user_const = _pruned_block(ckpt, bound, parts[0], u, items_all, ex_u, ex_i, k, stats)
            # Ranked in the model's float32: float64 holds every float32 exactly, so order and ties are the
            # same, and only the kept k values per user are widened (a float64 copy of the whole block
            # was a third of the scoring time at 1M ratings).
            # Ranked without the per-user constant (mu + b_u): it cannot change a user's order and adding
            # it to every cell cost a pass over the block; it is added to the kept k values only.
            vals, idx = (vals + user_const.view(-1, 1)).numpy(), idx.numpy()
            uu = np.repeat(u, k)
            keep = np.isfinite(vals.ravel())
            ranks = np.tile(np.arange(1, k + 1, dtype=np.int32), len(u))
            flat_u, flat_i, flat_raw = uu[keep], idx.ravel()[keep], vals.ravel()[keep].astype(np.float64)
            outs.append((flat_u, flat_i, ckpt.finish(flat_raw, flat_u).astype(np.float32), ranks[keep]))
    return tuple(np.concatenate(parts) for parts in zip(*outs))


def _dense_block(ckpt: Checkpoint, u: np.ndarray, items_all: torch.Tensor, ex_u: np.ndarray, ex_i: np.ndarray,
                 k: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Every title of block users ``u``: ``(top-k values [B, k], their titles [B, k], user constants [B])``."""
    raw, user_const = ckpt.model.ranking_block(torch.from_numpy(u), items_all)
    _mask_excluded(raw, u, None, ex_u, ex_i)
    vals, idx = torch.topk(raw, k, dim=1)
    return vals, idx, user_const


def _pruned_block(ckpt: Checkpoint, bound: _Bound, user_factors: torch.Tensor, u: np.ndarray,
                  items_all: torch.Tensor, ex_u: np.ndarray, ex_i: np.ndarray, k: int, stats: ScoringStats
                  ) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """As :func:`_dense_block`, scoring only the titles that can enter the block users' lists."""
    n_items = len(items_all)
    p = user_factors.detach()[torch.from_numpy(u)].double().numpy()
    user_norm = np.sqrt((p * p).sum(1))
    # A first look: the titles with the best bound for a typical user of the block give each user a floor.
    head_n = min(n_items, max(8 * k, 256))
    head = np.sort(np.argsort(-(bound.b + float(np.mean(user_norm)) * bound.norm), kind="stable")[:head_n])
    raw, user_const = ckpt.model.ranking_block(torch.from_numpy(u), torch.from_numpy(head))
    _mask_excluded(raw, u, head, ex_u, ex_i)
    theta = torch.topk(raw, k, dim=1).values[:, -1].double().numpy()      # -inf: fewer than k unrated
    cols = np.union1d(head, bound.candidates(user_norm, theta))
    if len(cols) > len(head):
        raw, _ = ckpt.model.ranking_block(torch.from_numpy(u), torch.from_numpy(cols))
        _mask_excluded(raw, u, cols, ex_u, ex_i)
    stats.cells_scored += len(u) * (len(cols) + (len(head) if len(cols) > len(head) else 0))
    stats.cells_skipped += len(u) * (n_items - len(cols))
    kk = min(k + 1, len(cols))
    vals, pos = torch.topk(raw, kk, dim=1)
    # Where topk's order among equal scores could depend on the other columns, or a user has fewer
    # than k scored titles that are not rated, that user gets every title (the dense path).
    v = vals.numpy()
    tied = (v[:, 1:] == v[:, :-1]).any(axis=1) | ~np.isfinite(v[:, k - 1]) if kk > 1 else ~np.isfinite(v[:, 0])
    vals, idx = vals[:, :k].clone(), torch.from_numpy(cols)[pos[:, :k]]
    if tied.any():
        # The whole block, as the dense path scores it: a product over fewer users can round differently
        # (a one-user product is a different BLAS routine).
        rows = torch.from_numpy(np.flatnonzero(tied))
        dv, di, _ = _dense_block(ckpt, u, items_all, ex_u, ex_i, k)
        vals[rows], idx[rows] = dv[rows], di[rows]
        stats.cells_scored += len(u) * n_items
        stats.users_full += len(rows)
    return vals, idx, user_const
