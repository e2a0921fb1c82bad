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

    Uses the difference form, not the Gram expansion: profiles are close to each other and the
    expansion loses precision exactly there. Memory A*R*K, which the caller bounds by batch sizes.
    """
    diff = a.unsqueeze(1) - b.unsqueeze(0)
    return torch.sqrt(torch.clamp((diff * diff).sum(-1), min=floor * floor))


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
