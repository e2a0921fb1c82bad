"""The distribution-calibration term: formula, gradients, guards, detaching, vectorisation, edge cases."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from synthetic import mnar_logs

from tasks.engine.calibration import DIST_FLOOR, calibration_term, calibration_term_per_user, pairwise_distance
from tasks.engine.profiles import soft_cdf, thresholds
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit

torch.set_num_threads(1)


def _profiles(n: int, k: int = 6, seed: int = 0) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    return torch.rand(n, k, generator=g, dtype=torch.float64).sort(dim=1).values


def _loop_term(adjusted: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """The issue's formula, one user at a time: d = ||F_u - F_v||, w = softmax(1/d), term = sum w d."""
    out = []
    for f in adjusted:
        d = np.linalg.norm(reference - f, axis=1)
        w = np.exp(1 / d - (1 / d).max())
        w /= w.sum()
        out.append((w * d).sum())
    return np.array(out)


def test_term_matches_per_user_loop() -> None:
    a, r = _profiles(7, seed=1), _profiles(5, seed=2)
    np.testing.assert_allclose(calibration_term_per_user(a, r).numpy(), _loop_term(a.numpy(), r.numpy()),
                               rtol=1e-12)
    assert calibration_term(a, r).item() == pytest.approx(_loop_term(a.numpy(), r.numpy()).mean(), rel=1e-12)


def test_gradcheck_calibration_term() -> None:
    a = _profiles(4, seed=3).requires_grad_(True)
    r = _profiles(3, seed=4)
    # Reference: torch.autograd.gradcheck (finite differences vs analytic gradient, float64).
    assert torch.autograd.gradcheck(lambda x: calibration_term(x, r), (a,), eps=1e-6, atol=1e-6)


def test_gradient_flows_through_the_softmax_weights() -> None:
    """The weights w_uv depend on F_u: their path changes the gradient (it is not a detached weighting)."""
    a = _profiles(3, seed=5).requires_grad_(True)
    r = _profiles(4, seed=6)
    g_full, = torch.autograd.grad(calibration_term(a, r), a)
    d = torch.cdist(a, r)
    g_fixed_w, = torch.autograd.grad((torch.softmax(1 / d, 1).detach() * d).sum(1).mean(), a)
    assert (g_full - g_fixed_w).abs().max() > 1e-3


def test_gradcheck_with_probe_target_extension() -> None:
    a = _profiles(4, seed=7).requires_grad_(True)
    r = _profiles(3, seed=8)
    target = _profiles(1, seed=9)[0]
    # Reference: torch.autograd.gradcheck, float64.
    assert torch.autograd.gradcheck(lambda x: calibration_term(x, r, target, 0.7), (a,), eps=1e-6, atol=1e-6)
    assert torch.autograd.gradcheck(lambda x: calibration_term(x, None, target, 0.7), (a,), eps=1e-6, atol=1e-6)
    # The extension adds exactly target_weight * ||F_u - G|| per user.
    extra = calibration_term_per_user(a, r, target, 0.7) - calibration_term_per_user(a, r)
    torch.testing.assert_close(extra, 0.7 * torch.linalg.norm(a - target, dim=1))


def test_gradcheck_through_soft_cdf() -> None:
    g = torch.Generator().manual_seed(10)
    pred = (torch.rand(3, 8, generator=g, dtype=torch.float64) * 4 + 1).requires_grad_(True)
    t = thresholds(1, 5, 6, dtype=torch.float64)
    r = _profiles(4, seed=11)
    # Reference: torch.autograd.gradcheck, float64, through the sigmoid profile into the term.
    assert torch.autograd.gradcheck(lambda x: calibration_term(soft_cdf(x, t, 0.5), r), (pred,),
                                    eps=1e-6, atol=1e-6)


def test_zero_distance_guard_gives_finite_values_and_gradient() -> None:
    r = _profiles(3, seed=12)
    a = torch.cat([r[:1].clone(), _profiles(1, seed=13)]).requires_grad_(True)   # user 0 sits on reference 0
    term = calibration_term_per_user(a, r)
    assert torch.isfinite(term).all()
    assert term[0].item() <= 2 * DIST_FLOOR      # nearest reference dominates with distance ~ floor
    term.sum().backward()
    assert torch.isfinite(a.grad).all()


def test_reference_profiles_receive_no_gradient() -> None:
    a = _profiles(4, seed=14).requires_grad_(True)
    r = _profiles(3, seed=15).requires_grad_(True)
    calibration_term(a, r).backward()
    assert a.grad is not None and a.grad.abs().sum() > 0
    assert r.grad is None


def test_no_reference_users_and_no_adjusted_users() -> None:
    a = _profiles(4, seed=16).requires_grad_(True)
    assert calibration_term(a, None).item() == 0.0
    assert calibration_term(a, a.new_zeros((0, 6))).item() == 0.0
    assert calibration_term(a.new_zeros((0, 6)), _profiles(2)).item() == 0.0
    with pytest.raises(ValueError, match=r"\[A, K\]"):
        calibration_term_per_user(a[0], _profiles(2))


def _graph_size(t: torch.Tensor) -> int:
    seen, stack = set(), [t.grad_fn]
    while stack:
        fn = stack.pop()
        if fn is None or fn in seen:
            continue
        seen.add(fn)
        stack.extend(f for f, _ in fn.next_functions)
    return len(seen)


def test_term_is_vectorised_over_users() -> None:
    """A Python loop over users would add autograd nodes per user; the graph size must not grow."""
    r = _profiles(5, seed=17)
    sizes = [_graph_size(calibration_term(_profiles(n, seed=18).requires_grad_(True), r)) for n in (2, 50, 400)]
    assert sizes[0] == sizes[1] == sizes[2]


# ---- the term inside training: rounds say when it is skipped -----------------------------------------

def _fit_rounds(**debias: object):
    logs = mnar_logs(n_users=60, n_items=30, per_user=8, probe_users=40, probes_per_user=4, seed=2)
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 2, "model.batch_size": 128,
                              **{f"debias.{k}": v for k, v in debias.items()}})
    return fit(logs.organic, logs.probe, cfg), logs


def test_round_says_skipped_when_no_reference_users() -> None:
    res, _ = _fit_rounds(reference_p_min=0.0, reference_p_max=0.0)
    assert [r["calibration"] for r in res.rounds] == ["skipped: no reference users this round"] * 2
    assert all(r["reference_users"] == 0 and r["reference_share"] == 0.0 for r in res.rounds)
    assert all(np.isnan(r["calibration_term"]) for r in res.rounds)


def test_round_skips_when_every_user_is_a_reference_user() -> None:
    # Every member has a probe rating here, and p = 1 for all: nobody is left to adjust.
    logs = mnar_logs(n_users=40, n_items=30, per_user=8, probe_users=40, probes_per_user=6, seed=3)
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 2, "model.batch_size": 128,
                              "debias.reference_p_min": 1.0, "debias.reference_p_max": 1.0,
                              "debias.heldout_share": 0.01})
    res = fit(logs.organic, logs.probe, cfg)
    assert res.probe_fit["user_id"].nunique() == 40      # setup: every member kept a fitting probe rating
    assert [r["calibration"] for r in res.rounds] == ["skipped: every active user is a reference user"] * 2
    assert all(r["reference_share"] == 1.0 and r["adjusted_users"] == 0 for r in res.rounds)


def test_probe_target_keeps_the_term_on_without_reference_users() -> None:
    res, _ = _fit_rounds(reference_p_min=0.0, reference_p_max=0.0, probe_target_weight=1.0)
    assert [r["calibration"] for r in res.rounds] == ["on", "on"]
    assert all(r["calibration_term"] > 0 for r in res.rounds)


def test_pairwise_distance_matches_scipy_even_for_close_profiles() -> None:
    from scipy.spatial.distance import cdist

    g = torch.Generator().manual_seed(19)
    base = torch.rand(1, 10, generator=g).sort(dim=1).values
    a = base + 1e-3 * torch.randn(6, 10, generator=g)          # float32, all within ~3e-3 of each other
    b = base + 1e-3 * torch.randn(4, 10, generator=g)
    d = pairwise_distance(a, b)
    assert d.dtype == torch.float32
    # Reference: scipy.spatial.distance.cdist (Euclidean, float64) on the same float32 values.
    np.testing.assert_allclose(d.numpy(), cdist(a.double().numpy(), b.double().numpy()), rtol=1e-5)


def test_hand_written_backward_matches_autograd_of_the_formula_in_float32() -> None:
    """Training runs in float32 with profiles lying close together: the closed-form backward must agree with
    autograd through the plain formula (Gram distances in float64, as the forward computes them)."""
    g = torch.Generator().manual_seed(21)
    r = torch.rand(300, 10, generator=g).sort(dim=1).values
    # adjusted profiles near some references (distances ~1e-3..1e-1) and one exactly on a reference
    a = (r[:40] + 0.01 * torch.randn(40, 10, generator=g)).clamp(0, 1)
    a[0] = r[0]
    a.requires_grad_(True)
    calibration_term_per_user(a, r).sum().backward()
    fused = a.grad.clone()
    b = a.detach().clone().requires_grad_(True)
    d = pairwise_distance(b, r)
    ((torch.softmax(1.0 / d, dim=1) * d).sum(dim=1)).sum().backward()
    # Reference: torch autograd of the same expression (float32 softmax over float64-computed distances).
    torch.testing.assert_close(fused, b.grad, rtol=1e-4, atol=1e-4)
    torch.testing.assert_close(calibration_term_per_user(a, r).detach(),
                               (torch.softmax(1.0 / d, dim=1) * d).sum(dim=1).detach(), rtol=1e-6, atol=1e-7)


# ---- the fused step term: soft CDF + term in one node, references prepared once per round ------------

def _block(users: int, items: int, seed: int) -> torch.Tensor:
    g = torch.Generator().manual_seed(seed)
    return (3.0 + 1.2 * torch.randn(users, items, generator=g)).requires_grad_(True)


@pytest.mark.parametrize("target_weight", [0.0, 0.7])
def test_fused_step_term_is_bit_identical_to_soft_cdf_then_term(target_weight: float) -> None:
    """Training's step term must keep checkpoints as they were: same value and gradient, bit for bit, as the
    two-node composition it replaced (soft_cdf, then calibration_term_per_user)."""
    from tasks.engine.calibration import References, profile_term_per_user

    t = thresholds(1.0, 5.0, 10)
    refs = soft_cdf(3.0 + torch.randn(90, 256, generator=torch.Generator().manual_seed(30)), t, 0.1)
    target = torch.linspace(0.05, 1.0, 10)
    a, b = _block(41, 256, seed=31), _block(41, 256, seed=31)
    old = calibration_term_per_user(soft_cdf(a, t, 0.1), refs, target, target_weight).sum()
    new = profile_term_per_user(b, t, 0.1, References(refs), target, target_weight).sum()
    (old * 0.37).backward()
    (new * 0.37).backward()
    assert torch.equal(old.detach(), new.detach())
    assert torch.equal(a.grad, b.grad)


def test_fused_step_term_matches_autograd_of_the_plain_formula() -> None:
    """Against the formula written the obvious way (mean of sigmoids, Euclidean distances, softmax of 1/d)
    and differentiated by torch autograd, in float64."""
    from tasks.engine.calibration import References, profile_term_per_user

    t = thresholds(1.0, 5.0, 8, dtype=torch.float64)
    refs = soft_cdf(3.0 + torch.randn(30, 64, generator=torch.Generator().manual_seed(32), dtype=torch.float64),
                    t, 0.3)
    target = torch.linspace(0.1, 1.0, 8, dtype=torch.float64)
    pred = _block(12, 64, seed=33).detach().double().requires_grad_(True)
    fused = profile_term_per_user(pred, t, 0.3, References(refs), target, 0.5)
    g_fused, = torch.autograd.grad(fused.sum(), pred)
    plain_pred = pred.detach().clone().requires_grad_(True)
    f = torch.sigmoid((t.view(1, 1, -1) - plain_pred.unsqueeze(-1)) / 0.3).mean(dim=1)          # [U, K]
    d = torch.sqrt(((f.unsqueeze(1) - refs.unsqueeze(0)) ** 2).sum(-1))                          # [U, R]
    plain = (torch.softmax(1.0 / d, dim=1) * d).sum(dim=1) + 0.5 * torch.sqrt(((f - target) ** 2).sum(-1))
    g_plain, = torch.autograd.grad(plain.sum(), plain_pred)
    # Reference: torch autograd of the straightforward formula.
    torch.testing.assert_close(fused.detach(), plain.detach(), rtol=1e-10, atol=1e-12)
    torch.testing.assert_close(g_fused, g_plain, rtol=1e-7, atol=1e-10)
    assert torch.autograd.gradcheck(lambda x: profile_term_per_user(x, t, 0.3, References(refs), target, 0.5),
                                    (pred[:3, :20].detach().clone().requires_grad_(True),), eps=1e-6, atol=1e-6)


def test_fused_step_term_without_references_is_the_extra_target_alone() -> None:
    from tasks.engine.calibration import profile_term_per_user

    t = thresholds(1.0, 5.0, 10)
    pred = _block(5, 32, seed=34)
    target = torch.linspace(0.05, 1.0, 10)
    alone = 0.7 * torch.sqrt(((soft_cdf(pred, t, 0.1) - target) ** 2).sum(-1))
    torch.testing.assert_close(profile_term_per_user(pred, t, 0.1, None, target, 0.7), alone, rtol=0, atol=0)
    assert profile_term_per_user(pred, t, 0.1, None).abs().sum().item() == 0.0
