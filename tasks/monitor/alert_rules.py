"""Skew-shift alert rules: a robust trailing band, absolute guards, and cool-down folding.

Pure functions: they read one night's metrics row (``schemas.NIGHTLY_METRICS``), the earlier rows and
the alert history records, and return :class:`Alert` values. Delivery lives in ``alert_delivery``.

The band rule
-------------
For each watched skew metric (organic minus probe mean, and Wasserstein-1 between organic and probe
ratings; both in stars), tonight's value is compared with the trailing baseline formed by the last
``drift.baseline_nights`` stored nights before tonight (missing nights are skipped, not filled)::

    band = median +- k * c_n * max(1.4826 * MAD, floor),   c_n = sqrt(1 + pi / (2 n))

``1.4826 * MAD`` estimates the standard deviation of normally distributed noise while ignoring up to
half the nights being outliers, so one odd night (or an earlier shift) does not widen the band the way
a standard deviation would. The constant is 1 / Phi^-1(3/4), the one
``scipy.stats.median_abs_deviation(x, scale="normal")`` uses (checked against it in
``tests/monitor/test_alert_rules.py``); the robustness argument is from memory (Rousseeuw & Croux 1993
discuss the MAD and its alternatives; recalled, not checked). ``k`` is ``drift.mad_k``. ``c_n`` turns
the band into a range for a *new* night: the baseline median itself is uncertain by about
sqrt(pi / (2 n)) sigma, which matters with the short baselines of the first weeks. That variance,
pi sigma^2 / (2 n) for the median of n normal values, is from memory (the large-sample variance of a
sample quantile, 1 / (4 n f^2) with f the density there); simulated in the tests, the true variance at
n = 5 and 14 is about 0.91 of it (so the band is a little wider than needed) and within 1 % from
n = 51 on. No skew alert is raised while fewer than ``drift.min_baseline_nights`` earlier nights have
a value.

The floor, and why: when the history is perfectly flat (a replayed log, a tiny constant population, a
metric pinned at 0) the MAD is 0 and the band collapses to a point, so the next night's float noise
(1e-16) would alert. The floor is the larger of

- a fixed minimum per metric (:data:`SCALE_FLOORS`): 0.5 % of the rating range, 0.02 stars on a 1-5
  scale. Far above float noise; below the night-to-night noise of any realistic night (measured on the
  simulated nights of ``tests/monitor/test_alert_rules.py``, about 1,500 organic ratings a night: 0.038 stars
  for the mean shift, 0.032 for W1), so it only acts on histories flatter than real data can be;
- tonight's own standard error (``<metric>_se`` from ``distributions.night_noise_se``: tonight's
  organic sample plus tonight's probes entering the reference, cluster-robust by member). A median
  and MAD of 5 to 14 nights often understate the spread by chance (for normal noise, 1.4826 * MAD
  of 5 values is below half of sigma 29 % of the time, of 14 values below 0.7 sigma 21 % of the
  time; simulated, 400,000 draws), and a quiet night with few ratings is noisier than the
  baseline; neither should make ordinary sampling noise look like a shift.

The Jensen-Shannon divergence is stored and reported but not watched: its sampling distribution is
skewed and its plug-in estimate is biased upward by small samples, so a band around its median
misfired (simulated nights: spread of (value - median) about 1.6 to 2.3 times its delta-method
standard error, against about 1.3 for the two star-valued metrics).

Measured on simulated stable nights (200 seeded 30-night series, default settings): 3 of 200 series
raised a skew alert (1.5 %), 3 alerts in 5,000 nights that could alert; a doubling of the share of
members who rate what they love was alerted on its first or second night in every one of 20 seeded
series. See ``tests/monitor/test_alert_rules.py``.

Absolute guards need no history: probe coverage collapsed, quarantine share high, and the candidate
(trained with the configured debiasing) clearly worse than the plain shadow model on held-out probes.

Cool-down folding
-----------------
Alerts of one kind whose nights lie within ``drift.cooldown_nights`` of the previous night of the same
kind fold into one episode: one alert id (``<kind>-<first date>``), a count, first and last date. Only
the first night of an episode is delivered to receivers; later nights are recorded, not re-sent.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field


import numpy as np
import pandas as pd

from tasks.config import Config, ConfigError
from tasks.dates import days_between
from tasks.monitor.night_metrics import jsonable

#: Consistency constant: 1.4826 * MAD estimates sigma for normal data; 1 / Phi^-1(3/4), as in
#: ``scipy.stats.median_abs_deviation(scale="normal")``.
MAD_TO_SIGMA = 1.4826

#: Watched selection-skew metrics -> (plain name, unit); "rating" is the rating scale's unit, written as
#: ``labels.rating_unit`` says.
SKEW_METRICS: dict[str, tuple[str, str]] = {
    "skew_mean_shift": ("organic minus probe mean rating", "rating"),
    "skew_w1": ("Wasserstein-1 distance between organic and probe ratings", "rating"),
}

#: Fixed part of the floor of the band's scale per metric (see module docstring), as a function of
#: the rating range (``scale.max - scale.min``) so it follows the configured scale.
SCALE_FLOORS: dict[str, object] = {
    "skew_mean_shift": lambda rating_range: 0.005 * rating_range,
    "skew_w1": lambda rating_range: 0.005 * rating_range,
}

KIND_SKEW = "skew_shift"
KIND_COVERAGE = "probe_coverage_low"
KIND_QUARANTINE = "quarantine_share_high"
KIND_WORSE = "candidate_worse_than_shadow"


@dataclass(frozen=True)
class Band:
    """Trailing baseline of one metric: ``lo``/``hi`` = median -+ k * scale; ``n`` = nights used."""
    median: float
    scale: float
    lo: float
    hi: float
    n: int
    floored: bool


@dataclass(frozen=True)
class Alert:
    """One alert. ``band`` is ``(lo, hi)`` for band rules and the crossed limit(s) for guards.

    Folding fields (set by :func:`fold_alerts`): ``alert_id``, ``status`` ("new" = first night of an
    episode, delivered; "ongoing" = folded into an earlier alert, recorded only), ``count``,
    ``first_date``, ``last_date``. ``advice`` (set by ``alert_advice.with_advice``): what to check, which
    command shows more, when the alert clears.
    """
    kind: str
    severity: str
    metric: str
    value: float
    band: tuple[float | None, float | None]
    explanation: str
    run_date: str
    also: tuple[str, ...] = ()
    alert_id: str = ""
    status: str = "new"
    count: int = 1
    first_date: str = ""
    last_date: str = ""
    extra: Mapping[str, object] = field(default_factory=dict)
    advice: Mapping[str, str] = field(default_factory=dict)

    def to_record(self) -> dict:
        """Plain JSON-able dict (the alert part of a history record)."""
        rec = dataclasses.asdict(self)
        rec["band"] = [_none_if_nan(b) for b in self.band]
        rec["value"] = _none_if_nan(self.value)
        rec["also"] = list(self.also)
        rec["extra"] = jsonable(dict(self.extra))
        return rec


def _none_if_nan(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def robust_band(values: Iterable[float], k: float, floor: float) -> Band | None:
    """Band ``median +- k * c_n * max(1.4826 * MAD, floor)`` of the finite ``values``; None if none.

    ``c_n = sqrt(1 + pi / (2 n))`` widens the band for the uncertainty of the baseline median itself
    (the sample median of ``n`` normal values has variance about ``pi / (2 n)`` sigma^2: from memory,
    checked by simulation in the tests), so the band is a prediction range for a new night, not a
    confidence range for the median; it matters for short baselines (1.15 at n = 5, 1.05 at n = 14).
    """
    v = np.asarray([x for x in values if x is not None and math.isfinite(float(x))], dtype=float)
    if v.size == 0:
        return None
    med = float(np.median(v))
    spread = MAD_TO_SIGMA * float(np.median(np.abs(v - med)))
    scale = max(spread, floor) * math.sqrt(1 + math.pi / (2 * v.size))
    return Band(median=med, scale=scale, lo=med - k * scale, hi=med + k * scale, n=int(v.size),
                floored=spread < floor)


def _finite(x: object) -> float | None:
    try:
        f = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def check_drift_config(cfg: Config) -> None:
    """Raise :class:`ConfigError` when the drift settings cannot work together."""
    d = cfg.drift
    if d.min_baseline_nights > d.baseline_nights:
        raise ConfigError(f"drift.min_baseline_nights ({d.min_baseline_nights}) exceeds drift.baseline_nights "
                          f"({d.baseline_nights}): skew alerts could never fire")


def trailing_history(history: pd.DataFrame, run_date: str, nights: int) -> pd.DataFrame:
    """The last ``nights`` stored rows strictly before ``run_date`` (sorted by date)."""
    if history is None or history.empty:
        return pd.DataFrame()
    earlier = history[history["run_date"].astype(str) < run_date]
    return earlier.sort_values("run_date").tail(nights)


def metric_band(metric: str, tonight: Mapping, history: pd.DataFrame, cfg: Config) -> Band | None:
    """The band tonight's ``metric`` is judged against, or None while the baseline is too short.

    Baseline: the last ``drift.baseline_nights`` stored nights before tonight. Scale floor: the
    larger of the metric's fixed floor (:data:`SCALE_FLOORS`) and tonight's own sampling standard
    error (``<metric>_se``), so a night is never held to a band narrower than its own noise.
    """
    d = cfg.drift
    base = trailing_history(history, str(tonight["run_date"]), d.baseline_nights)
    if base.empty or metric not in base:
        return None
    se = _finite(tonight.get(f"{metric}_se"))
    floor = max(SCALE_FLOORS[metric](cfg.scale.max - cfg.scale.min), se if se is not None else 0.0)
    band = robust_band(base[metric].tolist(), d.mad_k, floor)
    if band is None or band.n < d.min_baseline_nights:
        return None
    return band


def skew_alerts(tonight: Mapping, history: pd.DataFrame, cfg: Config) -> list[Alert]:
    """At most one ``skew_shift`` alert for tonight: the watched metric farthest outside its band
    (in band scales); other metrics outside their band are listed in ``also``."""
    check_drift_config(cfg)
    d = cfg.drift
    run_date = str(tonight["run_date"])
    outside: list[tuple[float, str, float, Band]] = []
    for metric in SKEW_METRICS:
        value = _finite(tonight.get(metric))
        if value is None:
            continue
        band = metric_band(metric, tonight, history, cfg)
        if band is None or band.lo <= value <= band.hi:
            continue
        excess = abs(value - band.median) / band.scale
        outside.append((excess, metric, value, band))
    if not outside:
        return []
    outside.sort(key=lambda t: (-t[0], t[1]))
    excess, metric, value, band = outside[0]
    name, unit = SKEW_METRICS[metric]
    severity = "critical" if excess > 2 * d.mad_k else "warning"
    direction = "above" if value > band.hi else "below"
    digits = 3 if unit == "bits" else 2
    unit = cfg.labels.rating_unit if unit == "rating" else unit
    users = cfg.labels.users
    text = (f"Selection skew moved: the {name} is {value:.{digits}f} {unit} tonight, {direction} its usual "
            f"range of {band.lo:.{digits}f} to {band.hi:.{digits}f} {unit} over the previous {band.n} nights "
            f"(median {band.median:.{digits}f}). {users[:1].upper() + users[1:]} are choosing what to rate "
            "differently than of late.")
    return [Alert(kind=KIND_SKEW, severity=severity, metric=metric, value=value, band=(band.lo, band.hi),
                  explanation=text, run_date=run_date, also=tuple(m for _, m, _, _ in outside[1:]),
                  extra={"median": band.median, "scale": band.scale, "baseline_nights": band.n,
                         "floored": band.floored, "excess_in_scales": excess})]


def guard_alerts(tonight: Mapping, cfg: Config) -> list[Alert]:
    """Absolute guards (no history needed): probe coverage, quarantine share, candidate vs shadow."""
    run_date = str(tonight["run_date"])
    out: list[Alert] = []
    users, unit = cfg.labels.users, cfg.labels.rating_unit

    def num(key: str) -> float:
        v = tonight.get(key)
        try:
            return float(v) if v is not None else math.nan
        except (TypeError, ValueError):
            return math.nan

    coverage, active = num("probe_coverage"), num("active_users")
    if math.isfinite(coverage) and active > 0 and coverage < cfg.drift.min_probe_coverage:
        out.append(Alert(
            kind=KIND_COVERAGE, severity="critical", metric="probe_coverage", value=coverage,
            band=(cfg.drift.min_probe_coverage, None), run_date=run_date,
            explanation=(f"Only {coverage:.2%} of tonight's {int(active)} active {users} gave a probe rating "
                         f"(minimum {cfg.drift.min_probe_coverage:.2%}). Probe errors, reference users and the "
                         f"held-out evaluation all rest on probe ratings: check the random probe programme.")))

    share = num("quarantine_share")
    if math.isfinite(share) and share > cfg.drift.max_quarantine_share:
        out.append(Alert(
            kind=KIND_QUARANTINE, severity="warning", metric="quarantine_share", value=share,
            band=(None, cfg.drift.max_quarantine_share), run_date=run_date,
            explanation=(f"{share:.2%} of tonight's input rows were quarantined (limit "
                         f"{cfg.drift.max_quarantine_share:.2%}); see the quarantine reasons in the report.")))

    cand, shadow = num("candidate_mae"), num("shadow_mae")
    n = num("candidate_n")
    if math.isfinite(cand) and math.isfinite(shadow) and (not math.isfinite(n) or n >= cfg.gate.min_heldout):
        gap = cand - shadow
        if gap > cfg.gate.tolerance_mae:
            # Non-overlapping intervals make the regression hard to put down to held-out sampling.
            clear = num("candidate_mae_lo") > num("shadow_mae_hi")
            out.append(Alert(
                kind=KIND_WORSE, severity="critical" if clear else "warning", metric="candidate_mae",
                value=cand, band=(None, shadow + cfg.gate.tolerance_mae), run_date=run_date,
                explanation=(f"The candidate's held-out probe MAE ({cand:.3f} {unit}) is {gap:.3f} {unit} worse than "
                             f"the plain shadow model's ({shadow:.3f}); tolerance {cfg.gate.tolerance_mae:.3f}. "
                             + ("Their confidence intervals do not overlap." if clear else
                                "Their confidence intervals overlap, so this may be sampling noise."))))
    return out


def evaluate_alerts(tonight: Mapping, history: pd.DataFrame, cfg: Config) -> list[Alert]:
    """All raw (unfolded) alerts for tonight: the skew band rule, then the absolute guards."""
    return skew_alerts(tonight, history, cfg) + guard_alerts(tonight, cfg)


#: History phase of an alert that a re-run of its night no longer raises (see ``alert_history``).
WITHDRAWN = "withdrawn"


def latest_states(records: Iterable[Mapping]) -> dict[str, dict]:
    """Latest history record per alert id (history is append-only; the last record wins). A withdrawn
    night ends an episode that consisted of that night alone and is otherwise ignored here."""
    state: dict[str, dict] = {}
    for rec in records:
        aid = rec.get("alert_id")
        if not aid:
            continue
        aid = str(aid)
        if rec.get("phase") == WITHDRAWN:
            cur = state.get(aid)
            if cur and cur.get("first_date") == cur.get("last_date") == rec.get("run_date"):
                del state[aid]
            continue
        state[aid] = dict(rec)
    return state


def fold_alerts(alerts: Iterable[Alert], history: Iterable[Mapping], run_date: str,
                cooldown_nights: int) -> list[Alert]:
    """Give each of tonight's alerts its episode: alert id, status, count, first and last date.

    - An episode of the same kind already covering ``run_date`` (a re-run of this night, or a
      backfill inside an episode) is reused unchanged: counts do not grow on re-runs.
    - Else, if the latest episode of that kind ended at most ``cooldown_nights`` nights before
      ``run_date``, tonight extends it: status "ongoing", count + 1, last date = tonight.
    - Else a new episode starts: ``alert_id = "<kind>-<run_date>"``, status "new", count 1.
    """
    states = list(latest_states(history).values())
    out = []
    for alert in alerts:
        same = [s for s in states if s.get("kind") == alert.kind and s.get("first_date") and s.get("last_date")]
        covering = [s for s in same if s["first_date"] <= run_date <= s["last_date"]]
        if covering:
            s = max(covering, key=lambda s: s["first_date"])
            out.append(dataclasses.replace(
                alert, alert_id=s["alert_id"], status="new" if s["first_date"] == run_date else "ongoing",
                count=int(s.get("count", 1)), first_date=s["first_date"], last_date=s["last_date"]))
            continue
        before = [s for s in same if s["last_date"] < run_date]
        prev = max(before, key=lambda s: s["last_date"]) if before else None
        if prev is not None and days_between(prev["last_date"], run_date) <= cooldown_nights:
            out.append(dataclasses.replace(
                alert, alert_id=prev["alert_id"], status="ongoing", count=int(prev.get("count", 1)) + 1,
                first_date=prev["first_date"], last_date=run_date))
        else:
            out.append(dataclasses.replace(alert, alert_id=f"{alert.kind}-{run_date}", status="new", count=1,
                                           first_date=run_date, last_date=run_date))
    return out
