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

from tasks.engine.profiles import soft_cdf, soft_cdf_backward, soft_cdf_block

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


def _squared_distance64(a64: torch.Tensor, b64: torch.Tensor, b_sq: torch.Tensor | None = None) -> torch.Tensor:
    """``|a|^2 + |b|^2 - 2 a.b`` for float64 rows, shape ``[A, R]``; ``b_sq`` ``[R]`` is ``|b|^2`` when the
    caller already holds it (the same for every step of a round)."""
    if b_sq is None:
        b_sq = (b64 * b64).sum(-1)
    return (a64 * a64).sum(-1, keepdim=True) + b_sq.unsqueeze(0) - 2.0 * (a64 @ b64.T)


class References:
    """A round's reference profiles ``[R, K]`` as the term reads them at every step: detached, widened to
    float64 (``g64``) with their squared norms ``sq`` ``[R]``, computed once per round instead of per step.
    """

    def __init__(self, profiles: torch.Tensor) -> None:
        if profiles.dim() != 2:
            raise ValueError(f"reference profiles must be [R, K], got shape {tuple(profiles.shape)}")
        self.profiles = profiles.detach()
        self.g64 = self.profiles.double()
        self.sq = (self.g64 * self.g64).sum(-1)

    def __len__(self) -> int:
        return self.profiles.shape[0]


def _soft_nearest_forward(f: torch.Tensor, refs: References):
    """``(term [A], (f64 [A, K], d [A, R], w [A, R], on_floor [A, R] or None))`` of
    ``term_u = sum_v softmax_v(1 / d_uv) d_uv`` for profiles f ``[A, K]``; the rest is what
    :func:`_soft_nearest_backward` reads besides ``term``."""
    f64 = f.double()
    sq = _squared_distance64(f64, refs.g64, refs.sq)
    # A profile on top of a reference is rare: one min() decides, and the [A, R] mask (and the backward's
    # pass to apply it) exists only when some distance is on the floor.
    on_floor = sq < DIST_FLOOR * DIST_FLOOR if bool(sq.min() < DIST_FLOOR * DIST_FLOOR) else None
    d = torch.clamp_(sq, min=DIST_FLOOR * DIST_FLOOR).sqrt_().to(f.dtype)            # [A, R]
    w = torch.softmax(d.reciprocal(), dim=1)
    term = (w * d).sum(dim=1)                                                          # [A]
    return term, (f64, d, w, on_floor)


def _soft_nearest_backward(grad_term: torch.Tensor, term: torch.Tensor, f64: torch.Tensor, d: torch.Tensor,
                           w: torch.Tensor, on_floor: torch.Tensor | None, g64: torch.Tensor) -> torch.Tensor:
    """Gradient ``[A, K]`` (in ``grad_term``'s dtype) of the term with respect to the profiles; see
    :class:`_SoftNearestDistance`."""
    # h = dterm/dd / d, scaled by the incoming gradient, in place on one [A, R] buffer.
    # 1 - x in one pass rounds exactly as -x + 1 did in two.
    h = (1.0 - (d - term.unsqueeze(1)).div_(d * d)).mul_(w).div_(d)
    h.mul_(grad_term.unsqueeze(1))
    if on_floor is not None:
        h.masked_fill_(on_floor, 0.0)
    h64 = h.double()
    grad = f64 * h64.sum(dim=1, keepdim=True) - h64 @ g64
    return grad.to(grad_term.dtype)


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
    def forward(ctx, f: torch.Tensor, refs: References) -> torch.Tensor:
        term, saved = _soft_nearest_forward(f, refs)
        ctx.save_for_backward(term, *saved)
        ctx.g64 = refs.g64
        return term

    @staticmethod
    def backward(ctx, grad_term: torch.Tensor):
        return _soft_nearest_backward(grad_term, *ctx.saved_tensors, ctx.g64), None


class _ProfileTerm(torch.autograd.Function):
    """The soft CDF of a block of predictions and its soft-nearest term in one autograd node:
    ``(term [U], profiles [U, K])`` from pred ``[U, S]``.

    The same operations in the same order as :func:`~tasks.engine.profiles.soft_cdf` followed by
    :class:`_SoftNearestDistance` (so the same bits), minus the glue between two nodes. Training calls it
    once per step with ~40 users at 1M ratings, where each small operation's fixed cost, not the
    arithmetic, is most of the term's time. ``profiles`` is an output so the optional extra target can
    be added on it with autograd; its gradient then joins the term's before the soft CDF's backward.
    """

    @staticmethod
    def forward(ctx, pred: torch.Tensor, t_scaled: torch.Tensor, inv_s: float, refs: References):
        ctx.set_materialize_grads(False)
        sig = soft_cdf_block(pred, t_scaled, inv_s)
        f = sig.mean(dim=2)
        term, saved = _soft_nearest_forward(f, refs)
        ctx.save_for_backward(sig, term, *saved)
        ctx.g64, ctx.inv_s = refs.g64, inv_s
        return term, f

    @staticmethod
    def backward(ctx, grad_term: torch.Tensor | None, grad_f: torch.Tensor | None):
        sig, *saved = ctx.saved_tensors
        if grad_term is not None:
            g = _soft_nearest_backward(grad_term, *saved, ctx.g64)
            grad_f = g if grad_f is None else g + grad_f
        if grad_f is None:
            return None, None, None, None
        return soft_cdf_backward(grad_f, sig, ctx.inv_s), None, None, None


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
        term = term + _SoftNearestDistance.apply(adjusted, References(reference))
    return _with_extra_target(term, adjusted, extra_target, target_weight)


def _with_extra_target(term: torch.Tensor, profiles: torch.Tensor, extra_target: torch.Tensor | None,
                       target_weight: float) -> torch.Tensor:
    """``term`` ``[A]`` plus ``target_weight * ||F_u - G||`` when the extra target is on."""
    if extra_target is not None and target_weight > 0:
        g = extra_target.detach().view(1, -1)
        term = term + target_weight * torch.sqrt(
            torch.clamp(((profiles - g) ** 2).sum(-1), min=DIST_FLOOR**2))
    return term


def profile_term_per_user(pred: torch.Tensor, t: torch.Tensor, sharpness: float, references: References | None,
                          extra_target: torch.Tensor | None = None, target_weight: float = 0.0) -> torch.Tensor:
    """Per-user term ``[U]`` of the soft CDFs of a block of predictions: the same value and gradient, bit for
    bit, as ``calibration_term_per_user(soft_cdf(pred, t, sharpness), references.profiles, ...)``, in fewer
    operations (one autograd node for soft CDF and term; the references widened once per round).

    pred: ``[U, S]`` predicted ratings (rating units, with gradient); t: ``[K]`` thresholds; references:
    the round's :class:`References` (or None); extra_target ``[K]`` as in :func:`calibration_term_per_user`.
    """
    if pred.dim() != 2:
        raise ValueError(f"pred must be [U, S], got shape {tuple(pred.shape)}")
    if references is None or len(references) == 0 or pred.shape[0] == 0:
        profiles = soft_cdf(pred, t, sharpness)
        return _with_extra_target(profiles.new_zeros(pred.shape[0]), profiles, extra_target, target_weight)
    if sharpness <= 0:
        raise ValueError(f"profile_sharpness must be positive, got {sharpness}")
    term, profiles = _ProfileTerm.apply(pred, (t / sharpness).to(pred.dtype), 1.0 / sharpness, references)
    return _with_extra_target(term, profiles, extra_target, target_weight)


def calibration_term(adjusted: torch.Tensor, reference: torch.Tensor | None,
                     extra_target: torch.Tensor | None = None, target_weight: float = 0.0) -> torch.Tensor:
    """Mean of :func:`calibration_term_per_user` over the adjusted users (0 when there are none)."""
    if adjusted.shape[0] == 0:
        return adjusted.new_zeros(())
    return calibration_term_per_user(adjusted, reference, extra_target, target_weight).mean()
