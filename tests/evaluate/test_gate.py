"""The promotion gate's rules one by one, and their order (tasks/evaluate/gate.py).

Invented held-out errors (stars) of the library-app demo; every number is invented.
"""

from __future__ import annotations

import math

import pytest

from handmade import model_errors
from tasks.config import GateConfig
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
