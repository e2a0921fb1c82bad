"""Per-user debiasing: a per-user correction of the prediction map, learned from probe ratings.

Organic ratings skew each user differently (one rates what they love, another what they hate), so one
global correction moves every user the same way and makes some worse. Here each user ``u`` gets a
non-decreasing affine map of the raw factoriser score::

    final_ui = scale_u * raw_ui + offset_u            (then clipped to the rating scale)

Designs (``debias.per_user_design``), all fitted on the probe *fitting* split only:

``offset``
    First cut, kept for comparison: a global monotone map ``f`` (isotonic regression on all probe
    ratings), then ``offset_u`` = the user's mean probe residual after ``f``, shrunk toward 0.
``skew_offset``
    A skew model (:mod:`tasks.engine.skew_model`) predicts each user's residual ``y - raw`` from how they
    rate organically; users without probe ratings get this prediction. A user's own probe residuals then
    update it (empirical Bayes, below).
``skew_affine`` (default)
    As ``skew_offset``, and the skew model also predicts a per-user slope on the user's own centred
    scores: ``y - raw ~ a(z_u) + g(z_u) * (raw_ui - m_u)`` with ``m_u`` the user's mean score over all
    items, ``a`` and ``g`` linear in the standardised features ``z_u``. A user whose organic ratings carry
    little contrast (all 5s) gets a flatter or steeper map, whichever their probe-rating neighbours show;
    ``scale_u = 1 + g`` is clipped to [0, 10] (0: the map stays non-decreasing, so a user's item order and
    top-N list never change; 10: a guard against a runaway fit, not reached in our measurements).

Empirical Bayes update: after the skew model, user u's residuals ``e_uj`` (n_u of them) move the offset by
``sum_j e_uj / (n_u + m)``: the posterior mean of a per-user shift with prior N(0, tau^2) and noise
variance sigma^2, ``m = sigma^2 / tau^2`` (``debias.per_user_prior``; 0 = estimate both variances from the
data by the method of moments, and skip the update when the between-user variance is not above noise).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from tasks.engine.recalibration import MonotoneMap
from tasks.engine.settings import DebiasSettings, Scale
from tasks.engine.skew_model import (FEATURE_NAMES, OrganicRows, fit_ridge, standardise, user_features,
                                     user_mean_prediction)

#: Clip of the per-user slope. An upper clip of 2 cost 24 points of gap closed under strong selection on
#: the open-data check (lovers' raw scores are compressed, their fitted slopes reach ~5), so it is wide.
SCALE_RANGE = (0.0, 10.0)


@dataclass
class PerUserCorrection:
    score_map: MonotoneMap
    user_offset: np.ndarray                  # [n_users] rating units
    user_scale: np.ndarray | None            # [n_users] unitless, None = all ones
    info: dict = field(default_factory=dict)  # facts for the checkpoint / report
    notes: list[str] = field(default_factory=list)


def shrinkage_strength(user_idx: np.ndarray, resid: np.ndarray) -> tuple[float, float, float]:
    """Method-of-moments ``(m, sigma2, tau2)`` for per-user shifts of ``resid`` (mean ~0 residuals).

    sigma^2: pooled within-user variance (users with 2+ ratings; overall variance when there are none);
    tau^2 = max(0, mean_u(mean_resid_u^2) - sigma^2 * mean_u(1/n_u)). ``m`` is ``inf`` when tau^2 = 0.
    """
    df = pd.DataFrame({"u": np.asarray(user_idx), "e": np.asarray(resid, float)})
    g = df.groupby("u")["e"].agg(["mean", "count", "var"])
    multi = g[g["count"] >= 2]
    if len(multi):
        sigma2 = float(np.average(multi["var"], weights=multi["count"] - 1))
    else:
        sigma2 = float(np.var(df["e"])) if len(df) > 1 else 0.0
    tau2 = max(0.0, float(np.mean(g["mean"] ** 2) - sigma2 * np.mean(1.0 / g["count"])))
    m = sigma2 / tau2 if tau2 > 0 else float("inf")
    return m, sigma2, tau2


def _own_update(n_users: int, u: np.ndarray, resid: np.ndarray, prior: float) -> tuple[np.ndarray, float, dict]:
    """Shrunk per-user mean residual ``sum / (n + m)`` and the ``m`` used."""
    if prior > 0:
        m, facts = prior, {"m": float(prior), "source": "config"}
    else:
        m, sigma2, tau2 = shrinkage_strength(u, resid)
        # m = None in the facts (JSON has no infinity): no between-user variance above noise, no update.
        facts = {"m": float(m) if np.isfinite(m) else None, "sigma2": sigma2, "tau2": tau2, "source": "estimated"}
    sums = np.bincount(u, weights=resid, minlength=n_users)
    counts = np.bincount(u, minlength=n_users)
    if not np.isfinite(m):
        return np.zeros(n_users), m, facts
    # m = 0 (no within-user noise measured, e.g. one probe rating each): a user's shift is their own mean
    # residual, and a user without probe ratings gets none (0, not 0/0).
    denom = counts + m
    return np.divide(sums, denom, out=np.zeros(n_users), where=denom > 0), m, facts


def fit_correction(ckpt, organic: pd.DataFrame | OrganicRows, probe_fit: pd.DataFrame, debias: DebiasSettings,
                   scale: Scale) -> PerUserCorrection:
    """Fit the per-user correction of ``ckpt`` (a trained checkpoint) on the probe fitting split.
    ``organic``: the run's organic ratings, as a frame or already as ``ckpt``'s rows (training passes
    those: it refits the correction every round)."""
    n_users = len(ckpt.users)
    design = debias.per_user_design
    if probe_fit.empty:
        return PerUserCorrection(MonotoneMap(), np.zeros(n_users), None, {"design": "none"},
                                 ["per_user: no probe ratings in the fitting split; predictions left uncorrected"])
    pu = ckpt.users.lookup(probe_fit["user_id"])
    pi = ckpt.items.lookup(probe_fit["item_id"])
    y = probe_fit["rating"].to_numpy(float)
    raw = ckpt.raw_scores(pu, pi)
    notes: list[str] = []
    if design != "offset" and len(y) < debias.per_user_min_probes:
        notes.append(f"per_user: {len(y)} probe ratings in the fitting split (< per_user_min_probes="
                     f"{debias.per_user_min_probes}); used the 'offset' design this time")
        design = "offset"

    if design == "offset":
        fmap = MonotoneMap.fit(raw, y) if len(y) >= 2 else MonotoneMap()
        offset, m, facts = _own_update(n_users, pu, y - fmap(raw), debias.per_user_prior)
        return PerUserCorrection(fmap, offset, None, {"design": "offset", "own_update": facts}, notes)

    if not isinstance(organic, OrganicRows):
        organic = OrganicRows.lookup(organic, ckpt.users, ckpt.items)
    z = standardise(user_features(ckpt.model, organic, scale.min, scale.max, scale.step))
    centre = user_mean_prediction(ckpt.model)
    affine = design == "skew_affine"

    def rows(u: np.ndarray, raw_ui: np.ndarray) -> np.ndarray:
        cols = [np.ones((len(u), 1)), z[u]]
        if affine:
            c = (raw_ui - centre[u])[:, None]
            cols += [c, z[u] * c]
        return np.hstack(cols)

    ridge = fit_ridge(rows(pu, raw), y - raw)
    k = z.shape[1]
    a = ridge.coef[0] + z @ ridge.coef[1:1 + k]                          # [n_users] offset at the centre
    g = (ridge.coef[1 + k] + z @ ridge.coef[2 + k:]) if affine else np.zeros(n_users)
    user_scale = np.clip(1.0 + g, *SCALE_RANGE)
    # final = raw + a + g * (raw - centre) = scale * raw + (a - g * centre)
    base_offset = a - (user_scale - 1.0) * centre
    fitted = user_scale[pu] * raw + base_offset[pu]
    own, m, facts = _own_update(n_users, pu, y - fitted, debias.per_user_prior)
    info = {"design": design, "rows": int(len(y)),
            "ridge_strength": float(ridge.strength) if np.isfinite(ridge.strength) else None,
            "loo_mse": float(ridge.loo_mse), "null_mse": float(ridge.null_mse), "own_update": facts,
            "coef": dict(zip(("intercept", *FEATURE_NAMES), ridge.coef[:1 + k].tolist()))}
    if affine:
        info["slope_coef"] = dict(zip(("slope", *FEATURE_NAMES), ridge.coef[1 + k:].tolist()))
    if not np.isfinite(ridge.strength):
        notes.append("per_user: the skew model did not beat a constant shift in leave-one-out error; "
                     "applied the mean probe residual to every user")
    return PerUserCorrection(MonotoneMap(), base_offset + own, user_scale if affine else None, info, notes)

