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
    return torch.sqrt(torch.clamp(_squared_distance64(a.double(), b.double()), min=floor * floor)).to(a.dtype)


def _squared_distance64(a64: torch.Tensor, b64: torch.Tensor) -> torch.Tensor:
    """``|a|^2 + |b|^2 - 2 a.b`` for float64 rows, shape ``[A, R]``."""
    return (a64 * a64).sum(-1, keepdim=True) + (b64 * b64).sum(-1).unsqueeze(0) - 2.0 * (a64 @ b64.T)


class _SoftNearestDistance(torch.autograd.Function):
    """``term_u = sum_v softmax_v(1 / d_uv) d_uv`` for profiles ``F`` [A, K] against references ``G`` [R, K],
    with a hand-written backward.

    Autograd's generic backward walks about fifteen [A, R] intermediates (Gram expansion, clamp, sqrt,
    reciprocal, softmax, product, the float64 casts); at 1M ratings that made the term cost more than the
    soft CDF it consumes. The gradient in closed form, with ``z_v = 1 / d_v`` and ``w = softmax(z)``:

        dterm/dd_v = w_v + w_v (d_v - term) dz_v/dd_v = w_v (1 - (d_v - term) / d_v^2)
        dd_v/dF    = (F - G_v) / d_v                      (0 where d_v sits on the floor)
        dterm/dF   = F * sum_v h_v - sum_v h_v G_v,  h_v = dterm/dd_v / d_v

    Distances come from :func:`pairwise_distance` (float64 Gram expansion, see there); the last line is
    assembled in float64 too, because ``F sum h`` and ``h G`` nearly cancel when F sits close to its
    references. Checked against autograd of the plain formula and by ``torch.autograd.gradcheck``
    (tests/engine/test_calibration.py).
    """

    @staticmethod
    def forward(ctx, f: torch.Tensor, g: torch.Tensor) -> torch.Tensor:
        f64, g64 = f.double(), g.double()
        sq = _squared_distance64(f64, g64)
        on_floor = sq < DIST_FLOOR * DIST_FLOOR
        d = torch.sqrt(torch.clamp_(sq, min=DIST_FLOOR * DIST_FLOOR)).to(f.dtype)       # [A, R]
        w = torch.softmax(d.reciprocal(), dim=1)
        term = (w * d).sum(dim=1)                                                          # [A]
        ctx.save_for_backward(f64, g64, d, w, term, on_floor)
        return term

    @staticmethod
    def backward(ctx, grad_term: torch.Tensor):
        f64, g64, d, w, term, on_floor = ctx.saved_tensors
        # h = dterm/dd / d, scaled by the incoming gradient, in place on one [A, R] buffer.
        h = (d - term.unsqueeze(1)).div_(d * d).neg_().add_(1.0).mul_(w).div_(d)
        h.mul_(grad_term.unsqueeze(1)).masked_fill_(on_floor, 0.0)
        h64 = h.double()
        grad = f64 * h64.sum(dim=1, keepdim=True) - h64 @ g64
        return grad.to(grad_term.dtype), None


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
    if reference is not None and reference.shape[0] > 0 and adjusted.shape[0] > 0:
        term = term + _SoftNearestDistance.apply(adjusted, reference.detach())
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
