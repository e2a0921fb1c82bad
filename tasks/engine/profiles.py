"""Rating profiles: a differentiable soft CDF of a user's predicted ratings over items.

``F_u[k] = mean_i sigmoid((t_k - rhat_ui) / s)`` with ``t_k`` = ``profile_points`` thresholds evenly spaced
over the rating scale and ``s`` = ``profile_sharpness`` (rating units). As ``s -> 0`` this tends to the
empirical CDF ``#{i : rhat_ui <= t_k} / n_items``.

(Written with ``rhat - t`` instead of ``t - rhat`` the same expression is the survival function
``1 - F``; distances between profiles, which is all the calibration term uses, are identical.)
"""

from __future__ import annotations

from typing import Callable

import torch


def thresholds(scale_min: float, scale_max: float, points: int, dtype=torch.float32) -> torch.Tensor:
    """``points`` evenly spaced thresholds from ``scale_min`` to ``scale_max`` inclusive; shape ``[K]``."""
    if points < 2:
        raise ValueError(f"profile_points must be at least 2, got {points}")
    if not scale_min < scale_max:
        raise ValueError(f"scale min ({scale_min}) must be below max ({scale_max})")
    return torch.linspace(scale_min, scale_max, points, dtype=dtype)


def soft_cdf(pred: torch.Tensor, t: torch.Tensor, sharpness: float) -> torch.Tensor:
    """Soft CDF of each row of ``pred``.

    pred: ``[U, S]`` predicted ratings of U users on S items each; t: ``[K]`` thresholds.
    Returns ``[U, K]`` in [0, 1], non-decreasing in k.
    """
    if sharpness <= 0:
        raise ValueError(f"profile_sharpness must be positive, got {sharpness}")
    return _SoftCdf.apply(pred, (t / sharpness).to(pred.dtype), 1.0 / sharpness)


def soft_cdf_block(pred: torch.Tensor, t_scaled: torch.Tensor, inv_s: float) -> torch.Tensor:
    """The soft CDF's sigmoid block ``sigmoid(t_k / s - pred_us / s)``, shape ``[U, K, S]``, from pred
    ``[U, S]`` (rating units), ``t_scaled = t / s`` ``[K]`` and ``inv_s = 1 / s``. Its mean over the last axis
    is the profile ``[U, K]``; :func:`soft_cdf_backward` needs the block itself.

    Laid out [U, K, S] so the long item axis is innermost (contiguous, vectorised); with the short K axis
    innermost the two big kernels ran ~1.5x slower (torch.profiler, 40 x 256 x 10 block).
    """
    return torch.sigmoid_(t_scaled.view(1, -1, 1) - (pred * inv_s).unsqueeze(1))


def soft_cdf_backward(grad_f: torch.Tensor, sig: torch.Tensor, inv_s: float) -> torch.Tensor:
    """Gradient ``[U, S]`` with respect to pred of the profile ``sig.mean(2)``, given its gradient ``grad_f``
    ``[U, K]`` and the block ``sig`` ``[U, K, S]`` of :func:`soft_cdf_block`.

    dF_k/dpred_s = -inv_s / S * sig (1 - sig); the constant is folded into the small [U, K] gradient, so the
    block is read once by one fused ``sigmoid_backward`` and summed over K.
    """
    g = (grad_f * (-inv_s / sig.shape[2])).unsqueeze(2).expand_as(sig)
    return torch.ops.aten.sigmoid_backward(g, sig).sum(dim=1)


class _SoftCdf(torch.autograd.Function):
    """``mean_s sigmoid(t_k / s - pred_us / s)`` with a hand-written backward.

    The [U, K, S] block is the calibration term's main cost; autograd's generic backward makes about
    twice as many passes over it (mean, negation and broadcast reductions each materialise it). Here:
    forward = broadcast-subtract, in-place sigmoid, mean; backward = one fused sigmoid_backward and one
    sum over K. Checked by ``torch.autograd.gradcheck`` in tests/engine/test_calibration.py.
    """

    @staticmethod
    def forward(ctx, pred: torch.Tensor, t_scaled: torch.Tensor, inv_s: float) -> torch.Tensor:
        sig = soft_cdf_block(pred, t_scaled, inv_s)
        ctx.save_for_backward(sig)
        ctx.inv_s = inv_s
        return sig.mean(dim=2)

    @staticmethod
    def backward(ctx, grad_f: torch.Tensor):
        sig, = ctx.saved_tensors
        return soft_cdf_backward(grad_f, sig, ctx.inv_s), None, None


def soft_cdf_chunked(predict: Callable[[torch.Tensor, torch.Tensor], torch.Tensor], users: torch.Tensor,
                     n_items: int, t: torch.Tensor, sharpness: float, budget_bytes: float) -> torch.Tensor:
    """Exact soft CDF over *all* items without materialising users x items beyond ``budget_bytes``.

    predict(u_idx [B], i_idx [C]) -> [B, C] predictions. Sums sigmoid values chunk by chunk (no autograd:
    used for targets and reporting). Returns ``[len(users), K]``.
    """
    k = t.numel()
    # Each cell of the block costs the prediction plus K sigmoid values (float32).
    cell_bytes = 4 * (k + 2)
    cells = max(1, int(budget_bytes // cell_bytes))
    item_chunk = max(1, min(n_items, cells))
    user_chunk = max(1, cells // item_chunk)
    out = torch.zeros(len(users), k)
    with torch.no_grad():
        for us in range(0, len(users), user_chunk):
            u = users[us:us + user_chunk]
            acc = torch.zeros(len(u), k)
            for it in range(0, n_items, item_chunk):
                i = torch.arange(it, min(n_items, it + item_chunk))
                p = predict(u, i)
                acc += torch.sigmoid((t.view(1, 1, -1) - p.unsqueeze(-1)) / sharpness).sum(dim=1)
            out[us:us + user_chunk] = acc / n_items
    return out


def empirical_cdf(values: torch.Tensor, t: torch.Tensor) -> torch.Tensor:
    """Plain ECDF of a 1-D sample at thresholds ``t``: ``#{v <= t_k} / n``; shape ``[K]``."""
    if values.numel() == 0:
        raise ValueError("empirical_cdf of an empty sample")
    return (values.view(-1, 1) <= t.view(1, -1)).to(t.dtype).mean(dim=0)


class ProfileSampler:
    """How one training run computes rating profiles: the thresholds ``t`` ``[K]``, the sharpness, and the
    uniform item-sample size per profile within the memory budget. Shared by the single-process and the
    data-parallel trainer so both draw exactly the same random numbers.

    ``sample == 0`` means all items. When exact all-item profiles *with gradient* for ``users_per_step``
    users would exceed ``memory_budget_mb``, the largest sample that fits is used instead and ``note`` says
    so (the estimate stays unbiased).
    """

    def __init__(self, scale_min: float, scale_max: float, debias, n_items: int, calibrated: bool) -> None:
        self.t = thresholds(scale_min, scale_max, debias.profile_points)
        self.sharpness = debias.profile_sharpness
        self.n_items = n_items
        self.budget = debias.memory_budget_mb * 2**20
        self.sample = debias.profile_item_sample
        self.note: str | None = None
        cell = 4 * (len(self.t) + 3)
        if calibrated and self.sample == 0 and debias.users_per_step * n_items * cell > self.budget:
            self.sample = max(8, int(self.budget // (debias.users_per_step * cell)))
            self.note = (f"profile over all {n_items} items exceeds memory_budget_mb; "
                         f"sampling {self.sample} items per user")

    def targets(self, model, users: torch.Tensor, gen: torch.Generator) -> torch.Tensor:
        """Profiles ``[len(users), K]`` with no gradient (they are targets): an independent uniform item
        sample per user, in user chunks within the budget; or exact over all items, chunked."""
        k = len(self.t)
        if len(users) == 0:
            return torch.zeros((0, k))
        if self.sample > 0:
            rows = max(1, int(self.budget // (self.sample * 4 * (k + 3))))
            with torch.no_grad():
                return torch.cat([soft_cdf(model.predict_sampled(c, torch.randint(0, self.n_items, (len(c), self.sample),
                                                                                   generator=gen)), self.t, self.sharpness)
                                  for c in torch.split(users, rows)])
        return soft_cdf_chunked(model.predict_block, users, self.n_items, self.t, self.sharpness, self.budget)

    def step_items(self, gen: torch.Generator) -> torch.Tensor:
        """Items of the adjusted users' profiles in one step: one uniform sample shared by the step's users.
        Each profile is still a mean over a uniform item sample (unbiased), but only ``sample`` item rows
        get a gradient instead of users x sample, which makes the sparse backward ~5x cheaper."""
        if self.sample > 0:
            return torch.randint(0, self.n_items, (self.sample,), generator=gen)
        return torch.arange(self.n_items)
