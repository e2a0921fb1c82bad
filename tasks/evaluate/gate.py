"""The promotion gate: does a candidate become live?

Rules, in order (the first that fails holds the candidate, with its reason):
1. at least ``gate.min_heldout`` held-out probe ratings to judge on;
2. candidate held-out MAE <= baseline MAE + ``gate.tolerance_mae`` (baseline: the live version; on the
   first night, or when live cannot be scored, the plain shadow model; with neither, the candidate is
   promoted once rule 1 holds);
3. no selection-skew segment's MAE rises above the baseline's by more than ``gate.max_segment_regression``
   (segments with fewer than ``gate.min_heldout`` ratings on either side are not judged).

Then two rules an operator may switch on, applied to a candidate the rules above promote
(:func:`hold_on_alert`, :func:`await_approval`):

4. ``gate.hold_on_alert`` ("off", "warning", "critical"): hold when the night raised an alert of that
   severity or worse. Off by default: the held-out probe ratings are the unbiased judge of a candidate,
   whatever the night's selection skew did; an operator may still prefer not to promote on such a night.
   The alerts come in as plain data (severity, kind): the flow evaluates the monitor's alert rules on
   the night's metrics before the gate decides. With the setting off, an alert is still named in the
   reason of a promoted candidate, so the choice shows.
5. ``gate.require_approval``: a candidate that passes everything waits as held with the reason
   "awaiting approval" (``awaiting_approval`` set) until a person approves it (``tarewise approve``).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace

from tasks.config import GateConfig
from tasks.evaluate.evaluation import Evaluation, ModelErrors


#: Alert severities from mild to severe, as ``gate.hold_on_alert`` names them.
SEVERITIES = ("info", "warning", "critical")


@dataclass(frozen=True)
class GateDecision:
    promote: bool
    compared_to: str          # "live" | "shadow" | "none"
    reason: str
    awaiting_approval: bool = False   # held only until a person approves it (gate.require_approval)

    def to_dict(self) -> dict:
        """The manifest's ``gate``; ``awaiting_approval`` appears only when true (older manifests lack it)."""
        d = asdict(self)
        if not self.awaiting_approval:
            del d["awaiting_approval"]
        return d


def baseline(evaluation: Evaluation) -> tuple[ModelErrors | None, str]:
    """What the candidate is judged against: live when it was scored on at least one rating, else the
    shadow model on the same terms, else nothing (``(None, "none")``)."""
    for name in ("live", "shadow"):
        e = getattr(evaluation, name)
        if e is not None and e.n > 0:
            return e, name
    return None, "none"


def decide(evaluation: Evaluation, cfg: GateConfig, alerts: Sequence[tuple[str, str]] = ()) -> GateDecision:
    """Apply the rules above to one night's held-out errors (MAEs in rating units) and its alerts
    (``(severity, kind)`` pairs, in the order raised)."""
    decision = judge_errors(evaluation, cfg)
    decision = hold_on_alert(decision, cfg, alerts)
    return await_approval(decision, cfg)


def alert_holds(severity: str, setting: str) -> bool:
    """Whether an alert of ``severity`` holds a candidate under ``gate.hold_on_alert = setting``: it does
    when its severity is the setting's or worse ("off" never holds)."""
    if setting == "off" or severity not in SEVERITIES or setting not in SEVERITIES:
        return False
    return SEVERITIES.index(severity) >= SEVERITIES.index(setting)


def hold_on_alert(decision: GateDecision, cfg: GateConfig, alerts: Sequence[tuple[str, str]]) -> GateDecision:
    """Rule 4: a promoted candidate is held when the night raised an alert that ``gate.hold_on_alert``
    holds on; the reason names the alert and the setting. An alert that does not hold is named in the
    promotion's reason. A candidate already held keeps its reason."""
    if not decision.promote or not alerts:
        return decision
    setting = cfg.hold_on_alert
    holding = [f"{sev} {kind}" for sev, kind in alerts if alert_holds(sev, setting)]
    if holding:
        return replace(decision, promote=False,
                       reason=f"tonight's {_and(holding)} alert holds it (gate.hold_on_alert = \"{setting}\"); on "
                              f"the held-out probe ratings alone it would be promoted ({decision.reason})")
    named = _and([f"{sev} {kind}" for sev, kind in alerts])
    return replace(decision, reason=f"{decision.reason}; tonight's {named} alert does not hold it "
                                    f"(gate.hold_on_alert = \"{setting}\")")


def await_approval(decision: GateDecision, cfg: GateConfig) -> GateDecision:
    """Rule 5: with ``gate.require_approval``, a candidate that passed every rule is held, awaiting approval."""
    if not decision.promote or not cfg.require_approval:
        return decision
    return replace(decision, promote=False, awaiting_approval=True,
                   reason=f"awaiting approval (gate.require_approval): {decision.reason}")


def _and(items: list[str]) -> str:
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


def judge_errors(evaluation: Evaluation, cfg: GateConfig) -> GateDecision:
    """Rules 1 to 3 on one night's held-out errors."""
    cand = evaluation.candidate
    base, name = baseline(evaluation)
    if cand.n < cfg.min_heldout:
        return GateDecision(False, name, f"only {cand.n} held-out probe ratings (< gate.min_heldout={cfg.min_heldout})")
    if base is None:
        return GateDecision(True, name, "nothing to compare with; promoted")
    c, b = cand.mae, base.mae
    if not math.isfinite(c):
        return GateDecision(False, name, "candidate MAE is not finite")
    if c > b + cfg.tolerance_mae:
        return GateDecision(False, name, f"held-out MAE {c:.4f} worse than {name} {b:.4f} by more than "
                                         f"gate.tolerance_mae={cfg.tolerance_mae}")
    for label, seg in sorted(cand.segments.items()):
        bseg = base.segments.get(label)
        if bseg is None or min(seg.n, bseg.n) < cfg.min_heldout:
            continue
        if seg.mae > bseg.mae + cfg.max_segment_regression:
            return GateDecision(False, name, f"segment '{label}' MAE {seg.mae:.4f} worse than {name} "
                                             f"{bseg.mae:.4f} by more than gate.max_segment_regression="
                                             f"{cfg.max_segment_regression}")
    return GateDecision(True, name, f"held-out MAE {c:.4f} vs {name} {b:.4f}: within tolerance")
