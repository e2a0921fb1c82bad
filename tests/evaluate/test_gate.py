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
