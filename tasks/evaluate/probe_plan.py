"""The probe plan: which members to show the probe card to on a date, and why.

The plan chooses people, never items: the titles on the card stay uniformly random, so every probe rating
is still missing at random *given the member*. Members who opted out are never chosen.

Score of an active member ``u`` (a member with any rating in the window), in squared rating units::

    score_u = w_u * (v_u(n_u) - v_u(n_u + 1)),    v_u(n) = 1 / (1 / tau2_u + n / sigma2)

``v_u(n)`` is the posterior variance of the member's own correction after ``n`` own probe ratings (the
normal-normal model whose posterior mean is the shrunk ``sum / (n + m)`` of ``engine/per_user.py``, with
``m = sigma2 / tau2``), so the score is how much one more probe rating shrinks it, times ``w_u``, the
member's activity weight: ``(organic ratings in the window + 1) ** probe.plan_activity_power`` over its
mean (their predictions are used that much more; 0 = every member counts the same).

``tau2_u`` is shrunk toward members similar to them: members are put in :data:`SIMILAR_BINS` bins by how
far their organic ratings sit above the items' organic means (the skew model's ``mean_vs_item`` feature;
members without organic ratings form their own bin), each bin's prior variance is estimated by the method
of moments (``per_user.shrinkage_strength``) from its members' probe residuals, and pulled toward the
population's with :data:`PSEUDO_MEMBERS` members' weight. Residuals are taken before the own update (the
live model's residual plus the member's own shift added back), so ``tau2`` is the own update's prior.

Selection (deterministic for a seed): the planned part (``budget - uniform``) takes the highest scores among
eligible members; then ``uniform = round(budget * probe.plan_uniform_share)`` members are drawn uniformly
at random from the eligible members the plan did not take. This is a stratified design: a planned member
was chosen with probability 1, every other eligible member with ``uniform / (eligible - planned)``; each
row records its ``draw_probability`` so a held-out error can be reweighted (:func:`weighted_mae`).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

from tasks.config import Config
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.per_user import shrinkage_strength
from tasks.engine.splits import heldout_mask
from tasks.schemas import ORGANIC, PROBE

#: Folder of plan files in the workspace: ``<workspace>/probe-plans/<date>.parquet`` (the date the cards
#: are shown, which is the date their probe ratings are logged under).
PLANS_DIR = "probe-plans"
#: Bins of similar members (quantiles of the organic mean above the items' means), plus "no organic".
SIMILAR_BINS = 5
#: Weight of the population's prior variance in a bin's, in members (common practice, no source).
PSEUDO_MEMBERS = 20.0
UNIFORM, PLANNED = "uniform", "planned"


def similar_groups(organic: pd.DataFrame, members: pd.Index) -> pd.Series:
    """Bin label per member: ``"q1"`` .. ``"q5"`` by mean organic rating minus the item's mean organic
    rating (quantile bins over members), ``"no organic"`` without organic ratings."""
    if organic.empty:
        return pd.Series("no organic", index=members, name="group")
    rel = organic["rating"] - organic.groupby("item_id", observed=True)["rating"].transform("mean")
    per = rel.groupby(organic["user_id"].astype(str).to_numpy()).mean().reindex(members)
    known = per.dropna()
    out = pd.Series("no organic", index=members, name="group", dtype=object)
    if len(known):
        k = min(SIMILAR_BINS, max(1, known.nunique()))
        ranks = known.rank(method="first")
        out.loc[known.index] = ["q%d" % (1 + int((r - 1) * k // len(known))) for r in ranks]
    return out


def member_facts(window: pd.DataFrame, probe_fit: pd.DataFrame, residual: np.ndarray,
                 own_m: float | None, activity_power: float = 1.0) -> pd.DataFrame:
    """Per active member (index ``member_id``, sorted): ``own_probes`` (fitting split), ``activity``
    (organic ratings), ``group``, ``prior_var`` (tau2, shrunk toward the group), ``noise_var`` (sigma2),
    ``post_var`` (v(n)) and ``score``.

    ``window``: the window's ratings (user_id, item_id, rating, source); ``probe_fit``: the fitting split
    of its probe ratings; ``residual``: rating minus the model's final score on ``probe_fit`` rows;
    ``own_m``: the own update's pseudo-ratings m (None or inf: no own update was applied);
    ``activity_power``: ``w_u`` is the activity weight to this power (``probe.plan_activity_power``; 0: every
    member's predictions count the same).
    """
    members = pd.Index(np.sort(pd.unique(window["user_id"].astype(str))), name="member_id")
    organic = window.loc[window["source"] == ORGANIC, ["user_id", "item_id", "rating"]]
    activity = organic["user_id"].astype(str).value_counts().reindex(members, fill_value=0)
    pu = probe_fit["user_id"].astype(str).to_numpy()
    e = np.asarray(residual, float)
    counts = pd.Series(pu).value_counts().reindex(members, fill_value=0)
    # Undo the own update: the live score includes shift_u = mean_resid_u * n_u / (n_u + m), so each
    # residual is smaller by it; add it back to recover the residual the own update saw.
    if len(e) and own_m is not None and math.isfinite(own_m) and own_m > 0:
        g = pd.DataFrame({"u": pu, "e": e}).groupby("u")["e"].agg(["mean", "count"])
        shift = g["mean"] * g["count"] / own_m
        e = e + shift.reindex(pu).to_numpy()
    group = similar_groups(organic, members)
    codes, uniq = pd.factorize(pd.Series(pu))
    if len(e) >= 2:
        _, sigma2, tau2 = shrinkage_strength(codes, e)
    else:
        sigma2, tau2 = 1.0, 0.0
    prior = pd.Series(tau2, index=members, dtype=float)
    if len(e):
        gp = group.reindex(pu).to_numpy()
        for label in pd.unique(group):
            sel = gp == label
            n_members = len(np.unique(codes[sel]))
            if n_members == 0:
                continue
            _, _, tau2_g = shrinkage_strength(codes[sel], e[sel]) if sel.sum() >= 2 else (0, 0, tau2)
            prior[group == label] = (n_members * tau2_g + PSEUDO_MEMBERS * tau2) / (n_members + PSEUDO_MEMBERS)
    sigma2 = max(float(sigma2), 1e-9)
    n = counts.to_numpy(float)
    t2 = prior.to_numpy(float)

    def post(k: np.ndarray) -> np.ndarray:
        with np.errstate(divide="ignore"):
            return np.where(t2 > 0, 1.0 / (1.0 / np.where(t2 > 0, t2, 1.0) + k / sigma2), 0.0)

    a = (activity.to_numpy(float) + 1.0) ** activity_power
    weight = a / a.mean()
    return pd.DataFrame({"own_probes": counts.to_numpy(np.int64), "activity": activity.to_numpy(np.int64),
                         "group": group.to_numpy(), "prior_var": t2, "noise_var": sigma2,
                         "post_var": post(n), "score": weight * (post(n) - post(n + 1))}, index=members)


def choose(facts: pd.DataFrame, budget: int, uniform_share: float, seed: int,
           opted_out: set[str] | frozenset[str] = frozenset()) -> pd.DataFrame:
    """The plan: ``budget`` members (fewer when fewer are eligible), never an opted-out one.

    Returns columns ``member_id, reason, score, drawn_by, draw_probability`` (planned rows first, by
    score; then uniform rows by member id). Ties in score are broken by a seeded random key.
    """
    if budget < 0:
        raise ValueError(f"budget must be >= 0, got {budget}")
    if not 0.0 <= uniform_share <= 1.0:
        raise ValueError(f"uniform share must be in [0, 1], got {uniform_share}")
    rng = np.random.default_rng(seed)
    eligible = facts.loc[~facts.index.isin(list(opted_out))]
    n_elig = len(eligible)
    budget = min(budget, n_elig)
    n_uniform = int(round(budget * uniform_share))
    n_planned = budget - n_uniform
    tie = rng.random(n_elig)
    order = np.lexsort((tie, -eligible["score"].to_numpy(float)))
    planned = eligible.iloc[order[:n_planned]]
    rest = eligible.iloc[order[n_planned:]]
    pick = np.sort(rng.choice(len(rest), size=n_uniform, replace=False)) if n_uniform else np.array([], int)
    uniform = rest.iloc[pick]
    p_uniform = n_uniform / len(rest) if len(rest) else 0.0
    why = (f"uniform share (probe.plan_uniform_share = {uniform_share:g}): drawn at random from the "
           f"{len(rest)} eligible members the plan did not pick")
    return pd.DataFrame({
        "member_id": np.concatenate([planned.index.to_numpy(str), uniform.index.to_numpy(str)]),
        "reason": _planned_reasons(planned) + [why] * len(uniform),
        "score": np.concatenate([planned["score"].to_numpy(float), uniform["score"].to_numpy(float)]),
        "drawn_by": [PLANNED] * len(planned) + [UNIFORM] * len(uniform),
        "draw_probability": np.concatenate([np.ones(len(planned)), np.full(len(uniform), p_uniform)])})


def _planned_reasons(planned: pd.DataFrame) -> list[str]:
    return [f"{int(n)} own probe ratings; correction uncertainty \u00b1{math.sqrt(v):.2f} (similar members: {g}); "
            f"{int(a)} organic ratings in the window"
            for n, v, g, a in zip(planned["own_probes"], planned["post_var"], planned["group"], planned["activity"])]


def weighted_mae(abs_errors: np.ndarray, draw_probability: np.ndarray) -> float:
    """Held-out MAE over members reweighted by each probe rating's draw probability: weights ``1/p``
    (Horvitz & Thompson 1952, JASA), normalised by their sum (the ratio form; from memory: Hajek's).

    Unbiased (up to the ratio form's O(1/n) bias) for the mean error over eligible members even when the
    plan over-samples some of them, because every eligible member had a known, positive chance."""
    e, p = np.asarray(abs_errors, float), np.asarray(draw_probability, float)
    if len(e) == 0:
        return float("nan")
    if (p <= 0).any() or not np.isfinite(p).all():
        raise ValueError("every draw probability must be positive and finite")
    w = 1.0 / p
    return float((w * e).sum() / w.sum())


def opted_out_members(table: pd.DataFrame, source: str) -> set[str]:
    """Member ids of an operator's opt-out list (a ``member_id`` column, or a single column of ids)."""
    if "member_id" in table.columns:
        col = table["member_id"]
    elif "user_id" in table.columns:
        col = table["user_id"]
    elif len(table.columns) == 1:
        col = table.iloc[:, 0]
    else:
        raise ValueError(f"{source}: no member_id column (columns: {', '.join(map(str, table.columns))})")
    return set(col.dropna().astype(str))



def probe_splits(window: pd.DataFrame, heldout_share: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """``(fitting, held-out)`` probe ratings of ``window``, split as training splits them."""
    probe = window.loc[window["source"] == PROBE, ["user_id", "item_id", "rating"]].reset_index(drop=True)
    if probe.empty:
        return probe, probe
    held = heldout_mask(probe["user_id"].astype(str).to_numpy(), probe["item_id"].astype(str).to_numpy(),
                        heldout_share)
    return probe[~held].reset_index(drop=True), probe[held].reset_index(drop=True)


def own_pseudo_ratings(ckpt: Checkpoint) -> float | None:
    """The own update's ``m`` recorded in the checkpoint (None: no own update, or not recorded)."""
    own = ((ckpt.info or {}).get("per_user") or {}).get("own_update") or {}
    m = own.get("m")
    return float(m) if m is not None else None


def facts_from_window(window: pd.DataFrame, ckpt: Checkpoint, cfg: Config) -> pd.DataFrame:
    """:func:`member_facts` for the window's members under ``ckpt`` (the live version's model)."""
    fitting, _ = probe_splits(window, cfg.debias.heldout_share)
    pred, _ = ckpt.score(fitting["user_id"].astype(str).to_numpy(), fitting["item_id"].astype(str).to_numpy())
    return member_facts(window, fitting, fitting["rating"].to_numpy(float) - pred, own_pseudo_ratings(ckpt),
                        cfg.probe.plan_activity_power)


def uniform_heldout(heldout: pd.DataFrame, window: pd.DataFrame, plans: Path) -> tuple[pd.DataFrame, int]:
    """The held-out probe ratings the gate may judge on when probe plans were followed: every one except
    those of members a plan *planned* (``drawn_by == "planned"``) on the rating's date. Returns the kept
    ratings and how many were left out.

    Planned members were chosen for what the model does not know about them; their probe ratings would
    tilt the held-out MAE toward them. What is left was drawn uniformly (the uniform share, and every
    night without a plan), so it stays an unbiased sample of the eligible members, short of the few the
    plan took (at most ``1 - plan_uniform_share`` of the budget, among all active members).
    :func:`weighted_mae` is the exact alternative that keeps every rating. ``heldout``: user_id, item_id,
    rating; ``window``: the window with ``dt`` and ``source`` (one row per pair: the store keeps the latest).
    """
    if heldout.empty or not plans.is_dir():
        return heldout, 0
    dates = set(map(str, window["dt"].unique()))
    planned = []
    for f in sorted(plans.glob("*.parquet")):
        if f.stem in dates:
            t = pd.read_parquet(f, columns=["member_id", "drawn_by"])
            planned.append(pd.DataFrame({"dt": f.stem, "user_id": t.loc[t["drawn_by"] == PLANNED, "member_id"]}))
    if not planned:
        return heldout, 0
    taken = pd.concat(planned, ignore_index=True).astype(str).drop_duplicates()
    probes = (window.loc[window["source"] == PROBE, ["user_id", "item_id", "dt"]].astype(str)
              .drop_duplicates(["user_id", "item_id"], keep="last"))
    dated = heldout.astype({"user_id": str, "item_id": str}).merge(probes, on=["user_id", "item_id"], how="left")
    drop = dated.merge(taken.assign(_planned=True), on=["dt", "user_id"], how="left")["_planned"].fillna(False)
    drop = drop.to_numpy(bool)
    return heldout.loc[~drop].reset_index(drop=True), int(drop.sum())
