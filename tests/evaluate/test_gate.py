"""The promotion gate's rules one by one, and their order (tasks/evaluate/gate.py).

Invented held-out errors (stars) of the library-app demo; every number is invented.
"""

from __future__ import annotations

import math
from dataclasses import replace

import pytest

from handmade import errors, model_errors
from tasks.config import GateConfig
from tasks.evaluate.anchor import AnchorComparison
from tasks.evaluate.evaluation import Evaluation
from tasks.evaluate.gate import baseline, decide

GATE = GateConfig(tolerance_mae=0.01, max_segment_regression=0.05, min_heldout=10)


def test_promotes_within_tolerance_of_live():
    d = decide(Evaluation(model_errors(0.805), shadow=model_errors(0.9), live=model_errors(0.80)), GATE)
    assert (d.promote, d.compared_to) == (True, "live")
    assert d.reason == "held-out MAE 0.8050 vs live 0.8000: within tolerance"
    assert d.to_dict() == {"promote": True, "compared_to": "live", "reason": d.reason}


def test_holds_when_worse_than_live_beyond_tolerance():
    d = decide(Evaluation(model_errors(0.82), live=model_errors(0.80)), GATE)
    assert (d.promote, d.compared_to) == (False, "live")
    assert "0.8200 worse than live 0.8000" in d.reason and "gate.tolerance_mae=0.01" in d.reason


def test_tolerance_edge_is_inclusive():
    # equal to the limit is within it; a hair above is not
    assert decide(Evaluation(model_errors(0.80), live=model_errors(0.80)), GateConfig(tolerance_mae=0.0)).promote
    assert not decide(Evaluation(model_errors(0.8000001), live=model_errors(0.80)), GateConfig(tolerance_mae=0.0)).promote


def test_falls_back_to_shadow_when_live_is_absent_or_unscored():
    for live in (None, model_errors(math.nan, n=0)):
        ev = Evaluation(model_errors(0.86), shadow=model_errors(0.80), live=live)
        assert baseline(ev)[1] == "shadow"
        d = decide(ev, GATE)
        assert (d.promote, d.compared_to) == (False, "shadow") and "worse than shadow 0.8000" in d.reason


def test_nothing_to_compare_with_promotes_once_enough_ratings():
    d = decide(Evaluation(model_errors(2.5)), GATE)
    assert (d.promote, d.compared_to, d.reason) == (True, "none", "nothing to compare with; promoted")


def test_too_few_heldout_ratings_holds_first():
    # rule 1 comes before everything: even a far better candidate with no baseline is held
    d = decide(Evaluation(model_errors(0.1, n=9), live=model_errors(0.8)), GATE)
    assert (d.promote, d.compared_to) == (False, "live")
    assert d.reason == "only 9 held-out probe ratings (< gate.min_heldout=10)"
    assert not decide(Evaluation(model_errors(0.1, n=9)), GATE).promote


def test_non_finite_candidate_mae_holds():
    d = decide(Evaluation(model_errors(math.nan), live=model_errors(0.8)), GATE)
    assert (d.promote, d.reason) == (False, "candidate MAE is not finite")
    assert not decide(Evaluation(model_errors(math.inf), shadow=model_errors(0.8)), GATE).promote


def test_segment_regression_holds_naming_the_segment():
    cand = model_errors(0.80, segments={"up": (0.92, 30), "down": (0.70, 30)})
    live = model_errors(0.80, segments={"up": (0.86, 30), "down": (0.80, 30)})
    d = decide(Evaluation(cand, live=live), GATE)
    assert not d.promote
    assert d.reason.startswith("segment 'up' MAE 0.9200 worse than live 0.8600")
    assert "gate.max_segment_regression=0.05" in d.reason


def test_overall_rule_is_judged_before_segments():
    cand = model_errors(0.90, segments={"up": (2.0, 30)})
    live = model_errors(0.80, segments={"up": (0.8, 30)})
    assert "held-out MAE 0.9000 worse than live" in decide(Evaluation(cand, live=live), GATE).reason


@pytest.mark.parametrize("cand_n, live_n", [(9, 30), (30, 9)])
def test_small_segments_are_not_judged(cand_n, live_n):
    # a segment with fewer than gate.min_heldout ratings on either side is skipped, however bad
    cand = model_errors(0.80, segments={"up": (3.0, cand_n)})
    live = model_errors(0.80, segments={"up": (0.8, live_n)})
    assert decide(Evaluation(cand, live=live), GATE).promote


def test_segment_missing_from_baseline_is_not_judged():
    cand = model_errors(0.80, segments={"unknown": (3.0, 50)})
    assert decide(Evaluation(cand, live=model_errors(0.80)), GATE).promote


def test_segments_are_judged_in_label_order():
    cand = model_errors(0.80, segments={"up": (1.0, 30), "down": (1.0, 30)})
    live = model_errors(0.80, segments={"up": (0.8, 30), "down": (0.8, 30)})
    assert "segment 'down'" in decide(Evaluation(cand, live=live), GATE).reason


# --------------------------------------------------------------------------------------------------
# Rules an operator switches on: hold on the night's alerts, wait for a person's approval
# --------------------------------------------------------------------------------------------------

PASSING = Evaluation(model_errors(0.805), shadow=model_errors(0.9), live=model_errors(0.80))
SKEW = [("critical", "skew_shift")]


def test_alerts_hold_nothing_by_default_but_are_named_in_the_reason():
    d = decide(PASSING, GATE, SKEW)
    assert d.promote and GATE.hold_on_alert == "off"
    assert d.reason == ("held-out MAE 0.8050 vs live 0.8000: within tolerance; tonight's critical skew_shift "
                        "alert does not hold it (gate.hold_on_alert = \"off\")")


@pytest.mark.parametrize("setting, severity, held", [
    ("critical", "critical", True), ("critical", "warning", False),
    ("warning", "warning", True), ("warning", "critical", True), ("warning", "info", False),
    ("off", "critical", False),
])
def test_hold_on_alert_holds_on_that_severity_or_worse(setting, severity, held):
    d = decide(PASSING, GATE.model_copy(update={"hold_on_alert": setting}), [(severity, "skew_shift")])
    assert d.promote is not held and d.compared_to == "live"
    if held:
        assert d.reason == (f"tonight's {severity} skew_shift alert holds it (gate.hold_on_alert = \"{setting}\"); "
                            "on the held-out probe ratings alone it would be promoted (held-out MAE 0.8050 vs "
                            "live 0.8000: within tolerance)")


def test_hold_on_alert_names_every_alert_that_holds_and_leaves_an_earlier_hold_alone():
    gate = GATE.model_copy(update={"hold_on_alert": "warning"})
    d = decide(PASSING, gate, [("critical", "skew_shift"), ("warning", "quarantine_share_high")])
    assert not d.promote and d.reason.startswith(
        "tonight's critical skew_shift and warning quarantine_share_high alert holds it")
    worse = decide(Evaluation(model_errors(0.82), live=model_errors(0.80)), gate, SKEW)
    assert not worse.promote and worse.reason.startswith("held-out MAE 0.8200 worse than live")
    assert decide(PASSING, gate, []).promote      # a quiet night is promoted


def test_require_approval_holds_a_passing_candidate_awaiting_approval():
    gate = GATE.model_copy(update={"require_approval": True})
    d = decide(PASSING, gate)
    assert (d.promote, d.awaiting_approval) == (False, True)
    assert d.reason == "awaiting approval (gate.require_approval): held-out MAE 0.8050 vs live 0.8000: within tolerance"
    assert d.to_dict()["awaiting_approval"] is True
    # a candidate the rules hold is held for that reason, not sent for approval
    for held in (decide(Evaluation(model_errors(0.82), live=model_errors(0.80)), gate),
                 decide(PASSING, gate.model_copy(update={"hold_on_alert": "critical"}), SKEW)):
        assert not held.promote and not held.awaiting_approval and "awaiting approval" not in held.reason
        assert "awaiting_approval" not in held.to_dict()


# --------------------------------------------------------------------------------------------------
# The anchor's cumulative budget (rule 3) and "no segment worse than doing nothing" (rule 5)
# --------------------------------------------------------------------------------------------------

def _anchor(cand: float, anchor: float, n: int = 120, vid: str = "v20261101-1", is_live: bool = False,
            compared: int = 3) -> AnchorComparison:
    return AnchorComparison(version_id=vid, run_date="2026-11-01", n=n, mae=anchor, candidate_mae=cand,
                            is_live=is_live, compared=compared)


def _chain(steps: list[float], cfg: GateConfig, start: float = 0.80) -> list[bool]:
    """Nights in a row, each candidate ``step`` worse than live on the same held-out ratings (every
    version scored on them exactly as it scored the night it was judged). A promoted candidate becomes
    live and joins the versions the anchor is chosen from (the last ``cfg.anchor_nights`` of them)."""
    promoted_maes = [start]            # the first live version
    decisions = []
    for step in steps:
        live = promoted_maes[-1]
        cand = live + step
        recent = promoted_maes[-cfg.anchor_nights:] if cfg.anchor_nights else []
        anchor = _anchor(cand, min(recent)) if recent else None
        d = decide(Evaluation(model_errors(cand), live=model_errors(live), anchor=anchor), cfg)
        decisions.append(d.promote)
        if d.promote:
            promoted_maes.append(cand)
    return decisions


def test_five_small_steps_down_are_held_by_the_anchor_where_the_one_step_rule_passes_them():
    small = [0.008] * 5                                   # 0.04 stars down in all, each step within 0.01
    one_step = GateConfig(tolerance_mae=0.01, min_heldout=10, anchor_nights=0)
    anchored = GateConfig(tolerance_mae=0.01, min_heldout=10, anchor_nights=14, anchor_budget=0.01)
    assert _chain(small, one_step) == [True] * 5          # the neighbour rule lets all five through
    assert _chain([0.04], one_step) == [False]            # ... but not the same decline in one step
    assert _chain([0.04], anchored) == [False]
    # With the budget: the first step passes (0.008 <= 0.01), the second adds up to 0.016 and is held;
    # live stays put, so every later step is judged against the same anchor and held too.
    assert _chain(small, anchored) == [True, False, False, False, False]


def test_anchor_budget_bounds_the_total_decline_of_what_goes_live():
    cfg = GateConfig(tolerance_mae=0.01, min_heldout=10, anchor_nights=14, anchor_budget=0.01)
    steps = [0.003] * 12
    decisions = _chain(steps, cfg)
    live_decline = sum(s for s, ok in zip(steps, decisions) if ok)
    assert decisions[:3] == [True] * 3 and not decisions[3]     # 0.009 passes, 0.012 does not
    assert live_decline <= cfg.anchor_budget + 1e-12


def test_within_the_anchor_budget_promotes_and_names_the_anchor():
    d = decide(Evaluation(model_errors(0.805), live=model_errors(0.80), anchor=_anchor(0.805, 0.797)), GATE)
    assert d.promote
    assert d.reason == ("held-out MAE 0.8050 vs live 0.8000: within tolerance; vs anchor v20261101-1 0.7970 "
                        "on 120 ratings: +0.0080")


def test_beyond_the_anchor_budget_holds_naming_anchor_rows_and_key():
    d = decide(Evaluation(model_errors(0.805), live=model_errors(0.80), anchor=_anchor(0.806, 0.79, n=97)), GATE)
    assert (d.promote, d.compared_to) == (False, "live")
    assert ("held-out MAE 0.8060 worse than the anchor v20261101-1 (the strongest of the last 3 versions) 0.7900 "
            "on the same 97 ratings by 0.0160, more than gate.anchor_budget=0.01") in d.reason
    live_anchor = _anchor(0.806, 0.79, is_live=True)
    assert "(the live version itself)" in decide(Evaluation(model_errors(0.805), live=model_errors(0.80),
                                                            anchor=live_anchor), GATE).reason


def test_anchor_budget_edge_is_inclusive_and_no_anchor_is_not_judged():
    cfg = GateConfig(tolerance_mae=0.01, min_heldout=10, anchor_budget=0.0)
    assert decide(Evaluation(model_errors(0.80), live=model_errors(0.80), anchor=_anchor(0.80, 0.80)), cfg).promote
    assert not decide(Evaluation(model_errors(0.80), live=model_errors(0.80), anchor=_anchor(0.8000001, 0.80)),
                      cfg).promote
    assert decide(Evaluation(model_errors(0.80), live=model_errors(0.80), anchor=None), cfg).promote


def test_live_rule_is_judged_before_the_anchor():
    d = decide(Evaluation(model_errors(0.90), live=model_errors(0.80), anchor=_anchor(0.90, 0.70)), GATE)
    assert "worse than live 0.8000" in d.reason and "anchor" not in d.reason


def test_a_segment_worse_than_the_plain_shadow_holds_even_when_live_is_as_bad():
    # live and candidate are both 0.15 worse than doing nothing on 'down': the live comparison passes it
    cand = model_errors(0.80, segments={"down": (0.95, 30), "up": (0.70, 30)})
    live = model_errors(0.80, segments={"down": (0.95, 30), "up": (0.72, 30)})
    shadow = model_errors(0.90, segments={"down": (0.80, 30), "up": (1.00, 30)})
    d = decide(Evaluation(cand, shadow=shadow, live=live), GATE)
    assert (d.promote, d.compared_to) == (False, "live")
    assert d.reason == ("segment 'down' MAE 0.9500 worse than the plain shadow model 0.8000 (below the candidate's "
                        "interval 0.9000-1.0000 on 30 ratings) by more than "
                        "gate.max_segment_regression=0.05: no segment may be worse than doing nothing "
                        "(gate.segments_vs_shadow = \"hold\")")
    noted = decide(Evaluation(cand, shadow=shadow, live=live), GateConfig(min_heldout=10, segments_vs_shadow="note"))
    assert noted.promote and noted.reason.endswith(
        "segment 'down' MAE 0.9500 worse than the plain shadow model 0.8000 (below the candidate's interval "
        "0.9000-1.0000 on 30 ratings) by more than "
        "gate.max_segment_regression=0.05, which does not hold it (gate.segments_vs_shadow = \"note\")")


def test_segments_against_the_shadow_follow_the_segment_tolerance_and_row_minimum():
    live = model_errors(0.80, segments={"down": (0.95, 30)})
    within = model_errors(0.80, segments={"down": (0.95, 30)})
    assert decide(Evaluation(within, shadow=model_errors(0.9, segments={"down": (0.90, 30)}), live=live), GATE).promote
    few = model_errors(0.9, segments={"down": (0.50, 9)})       # 9 < gate.min_heldout: not judged
    assert decide(Evaluation(within, shadow=few, live=live), GATE).promote
    assert decide(Evaluation(within, shadow=None, live=live), GATE).promote   # no shadow tonight


def test_a_segment_regression_inside_the_candidates_own_interval_does_not_hold() -> None:
    # 'down' is 0.08 worse than live and than the shadow, more than the 0.05 margin, but both lie inside
    # the candidate's interval on its 12 ratings (0.70-1.20): within noise, not judged a regression.
    noisy = model_errors(0.80, segments={"down": (0.95, 12)})
    noisy = replace(noisy, segments={"down": errors(0.95, 12, width=0.25)})
    live = model_errors(0.81, segments={"down": (0.87, 12)})
    shadow = model_errors(0.90, segments={"down": (0.87, 12)})
    assert decide(Evaluation(noisy, shadow=shadow, live=live), GATE).promote
    # the same point estimates with a tight interval (0.90-1.00) are beyond noise: held, the interval named
    tight = model_errors(0.80, segments={"down": (0.95, 12)}, width=0.05)
    d = decide(Evaluation(tight, shadow=shadow, live=live), GATE)
    assert not d.promote and "below the candidate's interval 0.9000-1.0000 on 12 ratings" in d.reason
