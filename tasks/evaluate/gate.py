"""The promotion gate: does a candidate become live?

Rules, in order (the first that fails holds the candidate, with its reason):
1. at least ``gate.min_heldout`` held-out probe ratings to judge on;
2. candidate held-out MAE <= baseline MAE + ``gate.tolerance_mae`` (baseline: the live version; on the
   first night, or when live cannot be scored, the plain shadow model; with neither, the candidate is
   promoted once rule 1 holds);
3. candidate held-out MAE <= anchor MAE + ``gate.anchor_budget`` on the same ratings (the anchor: the
   strongest of the last ``gate.anchor_nights`` versions that were live or promoted, re-scored on
   tonight's held-out probe ratings; see ``anchor.py``). A budget shared by every step since the anchor:
   five steps of 0.008 each pass rule 2 one by one, but not this rule once they add up past the budget.
   No anchor (first night, ``gate.anchor_nights = 0``, every recent version gone): not judged;
4. no selection-skew segment's MAE rises above the baseline's by more than ``gate.max_segment_regression``
   beyond the candidate's noise (the baseline's MAE lies below the candidate's bootstrap interval for the
   segment; segments with fewer than ``gate.min_heldout`` ratings on either side are not judged; segments
   are computed without the held-out ratings they are judged on, ``segments.judged_segments``);
5. no segment is worse than doing nothing: when the baseline is live, each segment is also compared
   with the plain shadow model under the same tolerance and row minimum, every night (without a shadow
   model tonight, ``runtime.shadow = false``, not judged). ``gate.segments_vs_shadow = "note"`` promotes
   such a candidate and names the segment in the reason instead.

Then two rules an operator may switch on, applied to a candidate the rules above promote
(:func:`hold_on_alert`, :func:`await_approval`):

6. ``gate.hold_on_alert`` ("off", "warning", "critical"): hold when the night raised an alert of that
   severity or worse. Off by default: the held-out probe ratings are the unbiased judge of a candidate,
   whatever the night's selection skew did; an operator may still prefer not to promote on such a night.
   The alerts come in as plain data (severity, kind): the flow evaluates the monitor's alert rules on
   the night's metrics before the gate decides. With the setting off, an alert is still named in the
   reason of a promoted candidate, so the choice shows.
7. ``gate.require_approval``: a candidate that passes everything waits as held with the reason
   "awaiting approval" (``awaiting_approval`` set) until a person approves it (``tarewise approve``).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace

from tasks.config import GateConfig
from tasks.evaluate.anchor import AnchorComparison
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
    """Rule 6: a promoted candidate is held when the night raised an alert that ``gate.hold_on_alert``
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
    """Rule 7: with ``gate.require_approval``, a candidate that passed every rule is held, awaiting approval."""
    if not decision.promote or not cfg.require_approval:
        return decision
    return replace(decision, promote=False, awaiting_approval=True,
                   reason=f"awaiting approval (gate.require_approval): {decision.reason}")


def _and(items: list[str]) -> str:
    return items[0] if len(items) == 1 else ", ".join(items[:-1]) + " and " + items[-1]


def judge_errors(evaluation: Evaluation, cfg: GateConfig) -> GateDecision:
    """Rules 1 to 5 on one night's held-out errors."""
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
    held = judge_anchor(evaluation.anchor, cfg)
    if held:
        return GateDecision(False, name, held)
    held = judge_segments(cand, base, name, cfg)
    if held:
        return GateDecision(False, name, held)
    below_plain = None
    if name == "live" and evaluation.shadow is not None:
        below_plain = judge_segments(cand, evaluation.shadow, "the plain shadow model", cfg)
        if below_plain and cfg.segments_vs_shadow == "hold":
            return GateDecision(False, name, f"{below_plain}: no segment may be worse than doing nothing "
                                             f"(gate.segments_vs_shadow = \"hold\")")
    reason = f"held-out MAE {c:.4f} vs {name} {b:.4f}: within tolerance" + anchor_note(evaluation.anchor)
    if below_plain:
        reason += f"; {below_plain}, which does not hold it (gate.segments_vs_shadow = \"note\")"
    return GateDecision(True, name, reason)


def judge_anchor(anchor: AnchorComparison | None, cfg: GateConfig) -> str | None:
    """Rule 3: the reason the candidate is held against the anchor, or None (within budget, or no anchor)."""
    if anchor is None or not anchor.margin > cfg.anchor_budget:
        return None
    which = "the live version itself" if anchor.is_live else f"the strongest of the last {anchor.compared} versions"
    return (f"held-out MAE {anchor.candidate_mae:.4f} worse than the anchor {anchor.version_id} ({which}) "
            f"{anchor.mae:.4f} on the same {anchor.n} ratings by {anchor.margin:.4f}, more than "
            f"gate.anchor_budget={cfg.anchor_budget}: the steps since the anchor add up")


def anchor_note(anchor: AnchorComparison | None) -> str:
    """The anchor comparison named in a promotion's reason ('' without an anchor)."""
    if anchor is None:
        return ""
    return f"; vs anchor {anchor.version_id} {anchor.mae:.4f} on {anchor.n} ratings: {anchor.margin:+.4f}"


def judge_segments(cand: ModelErrors, other: ModelErrors, name: str, cfg: GateConfig) -> str | None:
    """The first segment (label order) whose MAE is worse than ``other``'s by more than
    ``gate.max_segment_regression`` *beyond the candidate's noise*, as a reason; None when none is.

    Beyond noise: ``other``'s MAE lies below the candidate's bootstrap interval for that segment
    (``evaluate.confidence``); without an interval (``evaluate.bootstrap = 0``) the margin alone decides.
    A segment holds a handful of held-out ratings: on the demo and the InstEval long run, point
    comparisons of 10-40 ratings held candidates that were better overall and, by the ground truth, in
    that segment too (README, "Long run"). Segments with fewer than ``gate.min_heldout`` ratings on either
    side, or missing from ``other``, are not judged."""
    for label, seg in sorted(cand.segments.items()):
        oseg = other.segments.get(label)
        if oseg is None or min(seg.n, oseg.n) < cfg.min_heldout:
            continue
        within_noise = math.isfinite(seg.mae_lo) and seg.mae_lo <= oseg.mae
        if seg.mae > oseg.mae + cfg.max_segment_regression and not within_noise:
            interval = (f" (below the candidate's interval {seg.mae_lo:.4f}-{seg.mae_hi:.4f} on {seg.n} ratings)"
                        if math.isfinite(seg.mae_lo) else "")
            return (f"segment '{label}' MAE {seg.mae:.4f} worse than {name} {oseg.mae:.4f}{interval} by more "
                    f"than gate.max_segment_regression={cfg.max_segment_regression}")
    return None
