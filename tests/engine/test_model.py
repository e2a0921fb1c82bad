"""Biased MF and its training objective, checked against scipy's L-BFGS-B on the identical loss."""

from __future__ import annotations

import numpy as np
import pandas as pd
import torch
from scipy.optimize import check_grad, minimize
from synthetic import random_biased_mf

from tasks.engine.model import BiasedMF, build_model
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit

torch.set_num_threads(1)


def test_block_and_sampled_predictions_agree_with_pairwise_forward() -> None:
    m, g = random_biased_mf(7, 9, 3, 3.2, 0.5, seed=0)
    with torch.no_grad():
        users, items = torch.tensor([0, 4, 6]), torch.tensor([1, 2, 8, 5])
        block = m.predict_block(users, items)
        uu, ii = torch.meshgrid(users, items, indexing="ij")
        torch.testing.assert_close(block, m(uu.reshape(-1), ii.reshape(-1)).view(3, 4))
        sampled_items = torch.tensor([[1, 1, 3], [0, 8, 2], [5, 4, 7]])
        torch.testing.assert_close(m.predict_sampled(users, sampled_items),
                                   m(users.repeat_interleave(3), sampled_items.reshape(-1)).view(3, 3))


def test_fused_step_outputs_equal_separate_calls_and_their_gradients() -> None:
    m, g = random_biased_mf(8, 11, 3, 3.0, 0.5, seed=2)
    u, i = torch.tensor([0, 3, 3, 7]), torch.tensor([1, 10, 2, 1])
    bu, bi = torch.tensor([3, 5]), torch.tensor([2, 2, 9])

    def grads(fused: bool) -> tuple[list[torch.Tensor], list[torch.Tensor]]:
        m.zero_grad(set_to_none=True)
        if fused:
            outs = m.step_outputs(u, i, bu, bi)
        else:
            outs = (m(u, i), m.regulariser(u, i), m.predict_block(bu, bi))
        (outs[0].square().sum() + 0.3 * outs[1].sum() + outs[2].sin().sum()).backward()
        return [o.detach() for o in outs], [p.grad.to_dense() for p in m.parameters()]

    (out_f, grad_f), (out_s, grad_s) = grads(True), grads(False)
    for a, b in zip(out_f + grad_f, out_s + grad_s):
        torch.testing.assert_close(a, b)
    pred, pen, block = m.step_outputs(u, i)
    assert block is None and pred.shape == pen.shape == (4,)


def test_build_model_round_trips_hyper() -> None:
    m = BiasedMF(5, 4, 2, 3.5, 0.1, torch.Generator().manual_seed(0))
    m2 = build_model(m.hyper(), torch.Generator().manual_seed(1))
    m2.load_state_dict(m.state_dict())
    assert m2.hyper() == m.hyper()
    assert torch.equal(m2(torch.tensor([1, 4]), torch.tensor([0, 3])), m(torch.tensor([1, 4]), torch.tensor([0, 3])))


# ---- the objective against scipy.optimize.minimize -------------------------------------------------

U, I, D, WD = 12, 10, 2, 0.02


def _dense_problem():
    rng = np.random.default_rng(0)
    R = np.clip(np.rint(3 + rng.normal(0, .5, (U, 1)) + rng.normal(0, .5, (1, I))
                        + rng.normal(0, .6, (U, D)) @ rng.normal(0, .6, (D, I))), 1, 5)
    uu, ii = (a.ravel() for a in np.meshgrid(np.arange(U), np.arange(I), indexing="ij"))
    return uu, ii, R.ravel()


def _objective(x: np.ndarray, uu: np.ndarray, ii: np.ndarray, r: np.ndarray, mu: float):
    """Full-batch training loss of ``fit`` with ``debias.method = "plain"`` written out explicitly:

    J = mean_(u,i) (mu + b_u + b_i + p_u.q_i - r_ui)^2
        + weight_decay * mean_(u,i) (|p_u|^2 + |q_i|^2 + b_u^2 + b_i^2)

    with ``mu`` the (fixed) mean organic rating. Returns (J, dJ/dx).
    """
    n = len(r)
    P, Q = x[:U * D].reshape(U, D), x[U * D:(U + I) * D].reshape(I, D)
    bu, bi = x[(U + I) * D:(U + I) * D + U], x[(U + I) * D + U:]
    e = mu + bu[uu] + bi[ii] + (P[uu] * Q[ii]).sum(1) - r
    reg = (P[uu] ** 2).sum(1) + (Q[ii] ** 2).sum(1) + bu[uu] ** 2 + bi[ii] ** 2
    gP, gQ = np.zeros_like(P), np.zeros_like(Q)
    np.add.at(gP, uu, (2 * e[:, None] * Q[ii] + 2 * WD * P[uu]) / n)
    np.add.at(gQ, ii, (2 * e[:, None] * P[uu] + 2 * WD * Q[ii]) / n)
    gbu = np.bincount(uu, 2 * e + 2 * WD * bu[uu], U) / n
    gbi = np.bincount(ii, 2 * e + 2 * WD * bi[ii], I) / n
    return float((e ** 2).mean() + WD * reg.mean()), np.concatenate([gP.ravel(), gQ.ravel(), gbu, gbi])


def test_trained_mf_reaches_the_lbfgs_objective() -> None:
    uu, ii, r = _dense_problem()
    mu = float(r.mean())
    size = (U + I) * D + U + I
    rng = np.random.default_rng(1)
    f = lambda x: _objective(x, uu, ii, r, mu)  # noqa: E731
    # The explicit gradient is right (reference: scipy.optimize.check_grad, finite differences).
    assert check_grad(lambda x: f(x)[0], lambda x: f(x)[1], rng.normal(0, .3, size)) < 1e-6
    # Reference: scipy.optimize.minimize(method="L-BFGS-B"), best of 5 random starts, float64.
    best = min((minimize(f, rng.normal(0, .3, size), jac=True, method="L-BFGS-B",
                         options={"maxiter": 5000, "ftol": 1e-15, "gtol": 1e-10}) for _ in range(5)),
               key=lambda o: o.fun)

    organic = pd.DataFrame({"user_id": [f"member-{u:06d}" for u in uu], "item_id": [f"title-{i:06d}" for i in ii],
                            "rating": r})
    # Full batch (one step per epoch = exact gradient), no probe ratings (so no early stopping).
    cfg = Settings().updated({"debias.method": "plain", "model.batch_size": len(r), "model.max_epochs": 400,
                              "model.learning_rate": 0.05, "model.dim": D, "model.weight_decay": WD})
    res = fit(organic, None, cfg)
    ck = res.checkpoint
    m = ck.model
    um = ck.users.lookup([f"member-{u:06d}" for u in range(U)])
    im = ck.items.lookup([f"title-{i:06d}" for i in range(I)])
    x = np.concatenate([m.user_factors.weight.detach().double().numpy()[um].ravel(),
                        m.item_factors.weight.detach().double().numpy()[im].ravel(),
                        m.user_bias.weight.detach().double().numpy()[um, 0],
                        m.item_bias.weight.detach().double().numpy()[im, 0]])
    assert float(m.global_mean) == np.float32(mu)
    j_fit = f(x)[0]
    # Tolerance: 1e-6 relative, i.e. float32 Adam (400 full-batch steps) vs float64 L-BFGS-B; measured gap
    # is ~1e-13. Two-sided: Adam must not sit above the optimum, and no lower optimum was missed by scipy.
    assert abs(j_fit - best.fun) <= 1e-6 * best.fun, (j_fit, best.fun)
    # A model far from trained is clearly worse, so the check above has teeth.
    assert f(np.zeros(size))[0] > 1.5 * best.fun


def test_ranking_block_plus_user_constant_is_the_block() -> None:
    m, g = random_biased_mf(6, 11, 4, 3.1, 0.5, seed=5)
    with torch.no_grad():
        users, items = torch.tensor([5, 0, 3]), torch.arange(11)
        part, const = m.ranking_block(users, items)
        assert const.shape == (3,)
        torch.testing.assert_close(part + const.view(-1, 1), m.predict_block(users, items))