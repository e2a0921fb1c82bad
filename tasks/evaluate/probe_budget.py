"""What the random probe buys: how the gate's view sharpens as the nightly probe count grows.

From one night's held-out probe ratings (each with the candidate's and the baseline's absolute error) and
each active member's count of own probe ratings, estimate at a range of nightly probe counts:

``width``
    the width of the held-out MAE interval (percentile interval at ``evaluate.confidence``);
``power``
    the share of nights on which the promotion gate (its own rule, :func:`tasks.evaluate.gate.judge_errors`)
    holds a candidate that is worse than the baseline by ``regression`` MAE; ``false_hold`` is the same
    share with no regression at all;
``detectable``
    the regression the gate holds ``power_target`` of the time (``tolerance + z * se`` of the paired
    difference);
``own_share``
    the share of active members whose own probe ratings weigh at least half of their correction (own
    count >= the shrinkage's pseudo-ratings ``m``: ``n / (n + m) >= 1/2``, see ``engine/per_user.py``).

How (measured, not a formula alone): the gate's held-out set is taken to grow in proportion to the nightly
count (same window, same held-out share), so a nightly count ``N'`` against today's ``N`` means a held-out
set of ``n' = n * N' / N`` ratings. At and below today's count, ``draws`` held-out sets of ``n'`` ratings are
resampled (with replacement: a new night's probes are a fresh draw from the same population) from the
stored ones (above :data:`RESAMPLE_MAX` ratings, from the mean's normal limit), and each member's own
count is thinned binomially (each own probe kept with chance ``N'/N``; its expectation, exactly). The resampled spread is checked against the closed form for a mean's standard error,
``sd / sqrt(n)`` (textbook; ``scipy.stats.sem`` is the reference in the tests), and the power against
``1 - Phi((tolerance - d) / se)`` (``scipy.stats.norm``). Above today's count nothing can be resampled:
the width follows a power law ``a * n^b`` fitted to the resampled points (log-log least squares), and those
points carry ``modelled = True``; their own counts are Poisson with ``N'/N`` times each member's count
(members with none stay at none, so that share is a lower bound).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats


from tasks.config import Config, GateConfig
from tasks.engine.checkpoint import Checkpoint
from tasks.evaluate.evaluation import Evaluation, ModelErrors
from tasks.evaluate.gate import judge_errors
from tasks.evaluate.probe_plan import own_pseudo_ratings, probe_splits, uniform_heldout
from tasks.schemas import PROBE

#: Nightly counts tried, as multiples of today's: resampled up to 1, modelled above.
FRACTIONS = (0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0)
#: Resampled nights per point (the Monte Carlo error of a power near 0.5 is about 0.035 at 200).
DRAWS = 200
#: Cap on values drawn at once (draws x held-out size), to bound memory.
_CHUNK = 4_000_000
#: Above this many held-out ratings a resampled mean is drawn from its normal limit, N(mean, sd^2 / n)
#: (central limit theorem), instead of averaging n draws: the same spread at a fraction of the cost (a
#: night with 270,000 held-out ratings took minutes otherwise). Tests check the two agree at this size.
RESAMPLE_MAX = 20_000


@dataclass(frozen=True)
class BudgetPoint:
    """One nightly probe count and what the gate sees with it."""

    probes_per_night: int
    heldout_n: int            # held-out probe ratings the gate judges on at this count
    width: float              # width of the held-out MAE interval, rating units
    width_formula: float      # 2 * z * sd / sqrt(n): the closed form beside the measured width
    power: float              # share held with a regression of ``regression``
    power_formula: float
    false_hold: float         # share held with no regression
    detectable: float         # regression held ``power_target`` of the time
    own_share: float          # share of active members with enough own probes for their own correction
    modelled: bool            # above today's count: extrapolated, not resampled


@dataclass(frozen=True)
class Budget:
    today: int                          # probe ratings stored for the night
    heldout_n: int                      # the gate's held-out ratings tonight
    regression: float
    power_target: float
    tolerance: float                    # gate.tolerance_mae
    min_heldout: int                    # gate.min_heldout
    paired_with: str                    # "live" | "shadow" | "unpaired"
    own_threshold: float | None         # m (own probes needed); None: no per-member correction to judge
    active_members: int
    points: list[BudgetPoint]
    needed: int | None                  # nightly count at which power reaches power_target (None: never)
    needed_modelled: bool
    notes: list[str] = field(default_factory=list)

    def sentence(self) -> str:
        """The one sentence a product owner can act on."""
        d, p = f"{self.regression:g}", f"{self.power_target:.0%}"
        if self.needed is None:
            return (f"no probe count lets the gate detect a {d} regression {p} of the time: it tolerates "
                    f"{self.tolerance:g} (gate.tolerance_mae) by design")
        how = ("above today's count: modelled" if self.needed_modelled
               else "closed form, checked by resampling below today's count")
        today = next((q for q in self.points if q.probes_per_night == self.today), None)
        now = f"; today ({self.today}) it does {today.power:.0%} of the time" if today else ""
        return (f"at {self.needed} probes a night the gate detects a {d} regression {p} of the time "
                f"({how}){now}")

    def to_dict(self) -> dict:
        d = asdict(self)
        d["sentence"] = self.sentence()
        return d


def _clean(x: float) -> float | None:
    return float(x) if x is not None and math.isfinite(x) else None


def resampled_means(values: np.ndarray, size: int, draws: int, rng: np.random.Generator,
                    exact_up_to: int = RESAMPLE_MAX) -> np.ndarray:
    """Means of ``draws`` resamples (with replacement) of ``size`` of ``values``; ``[draws]``. Above
    ``exact_up_to`` the means are drawn from their normal limit (see :data:`RESAMPLE_MAX`)."""
    values = np.asarray(values, float)
    if size > exact_up_to:
        return values.mean() + values.std() / np.sqrt(size) * rng.standard_normal(draws)
    out = np.empty(draws)
    step = max(1, _CHUNK // max(size, 1))
    for s in range(0, draws, step):
        k = min(step, draws - s)
        out[s:s + k] = values[rng.integers(0, len(values), size=(k, size))].mean(axis=1)
    return out


def _gate_holds(cand_mae: np.ndarray, base_mae: float, n: int, gate: GateConfig) -> np.ndarray:
    """Whether the gate's own rule (rules 1 and 2; no segments) holds each candidate MAE."""
    nan = float("nan")

    def errors(mae: float) -> ModelErrors:
        return ModelErrors(n=n, mae=float(mae), rmse=nan, mae_lo=nan, mae_hi=nan, rmse_lo=nan, rmse_hi=nan)

    base = errors(base_mae)
    return np.array([not judge_errors(Evaluation(candidate=errors(c), live=base), gate).promote for c in cand_mae])


def own_share_thinned(own_counts: np.ndarray, active: int, threshold: float, fraction: float) -> float:
    """Expected share of ``active`` members with at least ``threshold`` own probes when each stored own probe
    is kept with chance ``fraction`` (<= 1: thinning the real history, exactly ``mean_u P(Binom(n_u, f) >=
    m)``, ``scipy.stats.binom``) or counts grow ``fraction``-fold (> 1: Poisson with mean ``f * n_u``,
    modelled). ``own_counts``: counts of members with at least one."""
    counts = np.asarray(own_counts, np.int64)
    if active <= 0:
        return float("nan")
    need = math.ceil(threshold)
    if need <= 0:
        return float(len(counts) / active) if fraction > 0 else 0.0
    if fraction <= 1.0:
        p = stats.binom.sf(need - 1, counts, fraction)
    else:
        p = stats.poisson.sf(need - 1, counts * fraction)
    return float(np.sum(p) / active)


def probe_budget(err_candidate: np.ndarray, err_baseline: np.ndarray | None, nightly_count: int,
                 own_counts: np.ndarray, active_members: int, own_threshold: float | None, gate: GateConfig,
                 confidence: float = 0.9, regression: float = 0.02, power_target: float = 0.8, seed: int = 0,
                 fractions: tuple[float, ...] = FRACTIONS, draws: int = DRAWS, paired_with: str = "live") -> Budget:
    """The budget curve from one night's held-out probe ratings.

    ``err_candidate``, ``err_baseline``: absolute errors ``[n]`` of the candidate and the baseline on the same
    held-out probe ratings (``err_baseline`` None: no baseline tonight; the difference's spread is then
    taken as that of two independent MAEs, ``sqrt(2) * sd / sqrt(n)``, an upper bound for paired models);
    ``nightly_count``: probe ratings stored for the night; ``own_counts``: own probe ratings (fitting split,
    window) of each member who has any; ``active_members``: members with any rating in the window;
    ``own_threshold``: own probes a member needs (``m``), None when the method has no per-member correction.
    """
    e = np.asarray(err_candidate, float)
    n_today, notes = len(e), []
    if n_today < 2 or nightly_count <= 0:
        raise ValueError(f"a budget needs at least two held-out probe ratings and a night with probe ratings "
                         f"(got {n_today} held-out, {nightly_count} tonight)")
    rng = np.random.default_rng(seed)
    z = float(stats.norm.ppf(0.5 + confidence / 2))
    z_power = float(stats.norm.ppf(power_target))
    base_mae = float(np.mean(err_baseline)) if err_baseline is not None else float(np.mean(e))
    if err_baseline is not None:
        diff = e - np.asarray(err_baseline, float)
    else:
        # No pairs: a synthetic difference with the spread of two independent MAEs.
        paired_with = "unpaired"
        diff = (e - e.mean()) * math.sqrt(2.0)
        notes.append("no baseline scored tonight: the difference of two MAEs is taken as unpaired "
                     "(sqrt(2) x one MAE's spread), which overstates the noise of a paired comparison")
    centred = diff - diff.mean()   # today's difference removed: only its noise is kept
    sd_e, sd_d = float(np.std(e)), float(np.std(centred))

    points: list[BudgetPoint] = []
    fit_n, fit_se = [], []
    for f in sorted(fractions):
        count = max(1, int(round(nightly_count * f)))
        n = max(1, int(round(n_today * f)))
        se_formula = sd_e / math.sqrt(n)
        dse_formula = sd_d / math.sqrt(n)
        power_formula = _power(gate, regression, dse_formula, n)
        own = (own_share_thinned(own_counts, active_members, own_threshold, f)
               if own_threshold is not None and math.isfinite(own_threshold) else float("nan"))
        if f <= 1.0:
            means = resampled_means(e, n, draws, rng)
            lo, hi = np.quantile(means, [0.5 - confidence / 2, 0.5 + confidence / 2])
            d_means = resampled_means(centred, n, draws, rng)
            power = float(_gate_holds(base_mae + d_means + regression, base_mae, n, gate).mean())
            false_hold = float(_gate_holds(base_mae + d_means, base_mae, n, gate).mean())
            dse = float(np.std(d_means))
            point = BudgetPoint(count, n, float(hi - lo), 2 * z * se_formula, power, power_formula, false_hold,
                                gate.tolerance_mae + z_power * dse, own, False)
            fit_n.append(n)
            fit_se.append(float(np.std(means)))
        else:
            a, b = _power_law(fit_n, fit_se)
            ratio = sd_d / sd_e if sd_e > 0 else 0.0
            se = a * n ** b
            dse = se * ratio
            point = BudgetPoint(count, n, 2 * z * se, 2 * z * se_formula, _power(gate, regression, dse, n),
                                power_formula, _power(gate, 0.0, dse, n), gate.tolerance_mae + z_power * dse,
                                own, True)
        points.append(point)
    if own_threshold is None or not math.isfinite(own_threshold):
        notes.append("no per-member correction with a finite shrinkage tonight: the share with enough own "
                     "probes is not shown")
    needed, needed_modelled = _needed(regression, gate, z_power, sd_d, n_today, nightly_count)
    return Budget(today=int(nightly_count), heldout_n=n_today, regression=regression, power_target=power_target,
                  tolerance=gate.tolerance_mae, min_heldout=gate.min_heldout, paired_with=paired_with,
                  own_threshold=_clean(own_threshold) if own_threshold is not None else None,
                  active_members=int(active_members), points=points, needed=needed,
                  needed_modelled=needed_modelled, notes=notes)


def _power(gate: GateConfig, regression: float, se: float, n: int) -> float:
    """Closed form of the gate's rule 2 (rule 1 holds everything below ``gate.min_heldout``):
    ``P(mean difference > tolerance) = 1 - Phi((tolerance - d) / se)`` (``scipy.stats.norm``)."""
    if n < gate.min_heldout:
        return 1.0
    if se <= 0:
        return float(regression > gate.tolerance_mae)
    return float(stats.norm.sf((gate.tolerance_mae - regression) / se))


def _power_law(n: list[int], se: list[float]) -> tuple[float, float]:
    """``(a, b)`` of ``se = a * n^b`` by least squares on the logs (points with se > 0)."""
    x, y = np.log(np.asarray(n, float)), np.asarray(se, float)
    ok = y > 0
    if ok.sum() < 2:
        return (float(y[-1]) * math.sqrt(n[-1]) if len(y) else 0.0), -0.5
    b, log_a = np.polyfit(x[ok], np.log(y[ok]), 1)
    return float(math.exp(log_a)), float(b)


def _needed(regression: float, gate: GateConfig, z_power: float, sd_d: float,
            n_today: int, nightly_count: int) -> tuple[int | None, bool]:
    """The smallest nightly count whose power reaches the target, from the closed form
    ``n = (z * sd / (d - tolerance))^2`` held-out ratings (at least ``gate.min_heldout``), scaled to a
    nightly count like the curve; the curve's resampled points check that form (see the tests)."""
    if regression <= gate.tolerance_mae:
        return None, False
    n_star = max(gate.min_heldout, math.ceil((z_power * sd_d / (regression - gate.tolerance_mae)) ** 2), 1)
    count = max(1, math.ceil(n_star * nightly_count / n_today))
    return count, count > nightly_count


def budget_table(budget: Budget) -> list[dict]:
    """The curve as rows for a printed table or the report."""
    return [{"probes a night": p.probes_per_night, "held-out n": p.heldout_n, "interval width": p.width,
             "closed form": p.width_formula, f"power at {budget.regression:g}": p.power,
             "closed form power": p.power_formula, "false hold": p.false_hold,
             f"detectable ({budget.power_target:.0%})": p.detectable,
             "own share": p.own_share, "modelled": p.modelled} for p in budget.points]


def budget_from_window(window: pd.DataFrame, run_date: str, candidate: Checkpoint, baseline: Checkpoint | None,
                       baseline_name: str, cfg: Config, plans: Path | None = None) -> Budget:
    """The budget of night ``run_date`` from its window (rows with ``dt``, ``source``), the night's candidate
    and the model it was judged against (``baseline_name``: "live" or "shadow"; None: no baseline). With
    ``plans`` (the workspace's plan folder), the held-out ratings are those the gate judges on
    (``probe_plan.uniform_heldout``). Raises ``ValueError`` when the night has too few probe ratings."""
    fitting, heldout = probe_splits(window, cfg.debias.heldout_share)
    if plans is not None:
        heldout, _ = uniform_heldout(heldout, window, plans)
    users, items = heldout["user_id"].astype(str).to_numpy(), heldout["item_id"].astype(str).to_numpy()
    y = heldout["rating"].to_numpy(float)
    err_c = np.abs(candidate.score(users, items)[0] - y)
    err_b = np.abs(baseline.score(users, items)[0] - y) if baseline is not None else None
    tonight = (window["dt"] == run_date) & (window["source"] == PROBE)
    own = fitting["user_id"].astype(str).value_counts().to_numpy()
    return probe_budget(err_c, err_b, int(tonight.sum()), own, int(window["user_id"].nunique()),
                        own_pseudo_ratings(candidate), cfg.gate, confidence=cfg.evaluate.confidence,
                        regression=cfg.probe.budget_regression, power_target=cfg.probe.budget_power,
                        seed=cfg.model.seed, paired_with=baseline_name if baseline is not None else "unpaired")
