"""The distribution-calibration term.

For adjusted user u with profile F_u and reference users v with (detached) profiles F_v:

    d(u, v) = ||F_u - F_v||_2
    w_uv    = softmax_v(1 / d(u, v))          (nearest references dominate)
    term_u  = sum_v w_uv * d(u, v)

and the term of a batch is the mean of ``term_u`` over its adjusted users. Optionally a fixed extra
target (e.g. the empirical CDF of probe ratings) adds ``target_weight * ||F_u - G||_2`` per user.
"""

from __future__ import annotations

import torch

#: Distances are floored here: it keeps 1/d finite and the gradient of sqrt defined at d = 0.
DIST_FLOOR = 1e-6


def pairwise_distance(a: torch.Tensor, b: torch.Tensor, floor: float = DIST_FLOOR) -> torch.Tensor:
    """Euclidean distances ``[A, R]`` between rows of a ``[A, K]`` and b ``[R, K]``, floored at ``floor``.

    Gram expansion ``|a|^2 + |b|^2 - 2 a.b`` (one matrix product instead of an [A, R, K] difference
    block, which cost as much as the profiles themselves), evaluated in float64: profiles lie close
    together and in float32 the expansion would cancel away exactly the small distances that matter
    (error ~1e-7 * |a|^2 ~ 1e-6 against d^2 ~ 1e-4); in float64 it stays ~1e-15, below ``floor**2``.
    Returned in ``a``'s dtype.
    """
    a64, b64 = a.double(), b.double()
    sq = (a64 * a64).sum(-1, keepdim=True) + (b64 * b64).sum(-1).unsqueeze(0) - 2.0 * (a64 @ b64.T)
    return torch.sqrt(torch.clamp(sq, min=floor * floor)).to(a.dtype)


def calibration_term_per_user(adjusted: torch.Tensor, reference: torch.Tensor | None,
                              extra_target: torch.Tensor | None = None,
                              target_weight: float = 0.0) -> torch.Tensor:
    """Per-user term, shape ``[A]``.

    adjusted: ``[A, K]`` profiles (with gradient). reference: ``[R, K]`` profiles, treated as targets
    (detached here, so callers cannot forget). extra_target: ``[K]``; used when ``target_weight > 0``.
    """
    if adjusted.dim() != 2:
        raise ValueError(f"adjusted profiles must be [A, K], got shape {tuple(adjusted.shape)}")
    term = adjusted.new_zeros(adjusted.shape[0])
    if reference is not None and reference.shape[0] > 0:
        d = pairwise_distance(adjusted, reference.detach())
        w = torch.softmax(1.0 / d, dim=1)
        term = term + (w * d).sum(dim=1)
    if extra_target is not None and target_weight > 0:
        g = extra_target.detach().view(1, -1)
        term = term + target_weight * torch.sqrt(
            torch.clamp(((adjusted - g) ** 2).sum(-1), min=DIST_FLOOR**2))
    return term


def calibration_term(adjusted: torch.Tensor, reference: torch.Tensor | None,
                     extra_target: torch.Tensor | None = None, target_weight: float = 0.0) -> torch.Tensor:
    """Mean of :func:`calibration_term_per_user` over the adjusted users (0 when there are none)."""
    if adjusted.shape[0] == 0:
        return adjusted.new_zeros(())
    return calibration_term_per_user(adjusted, reference, extra_target, target_weight).mean()
