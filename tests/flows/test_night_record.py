"""The night's typed record: what the nightly flow returns to its callers, and its one-line outcome."""

from __future__ import annotations

import json

from flows.night_record import NightRecord
from handmade import model_errors
from tasks.evaluate.evaluation import Evaluation
from tasks.evaluate.gate import GateDecision

KEYS = {"run_date", "kind", "status", "version_id", "state", "message", "gate", "evaluation", "counts",
        "durations", "alerts", "epoch_seconds", "shared"}


def test_done_night_as_plain_data():
    night = NightRecord("nightly", "2026-11-02", counts={"rows_ingested": 10}, durations={"train": 1.5})
    night.evaluation = Evaluation(model_errors(0.8), shadow=model_errors(0.9))
    night.gate = GateDecision(True, "shadow", "held-out MAE 0.8000 vs shadow 0.9000: within tolerance")
    night.alerts = ["warning: skew_shift - Selection skew moved (invented)."]
    night.done("v20261102-1", "live", message=night.gate.reason)
    out = night.to_dict()
    assert set(out) == KEYS
    assert out["evaluation"] == night.evaluation.to_dict() and out["evaluation"]["live"] is None
    assert out["gate"] == {"promote": True, "compared_to": "shadow", "reason": night.gate.reason}
    assert (out["status"], out["state"], out["message"]) == ("done", "live", night.gate.reason)
    json.dumps(out)  # plain data all the way down
    assert night.outcome() == "night 2026-11-02 is done here (version v20261102-1, live)"


def test_skipped_night_has_the_same_keys():
    night = NightRecord("backfill", "2026-11-01", counts={"rows_read": 3})
    night.skip("3 ratings in the window (< runtime.min_ratings_to_train=200); nothing trained or published")
    out = night.to_dict()
    assert set(out) == KEYS and out["evaluation"] is None and out["gate"] is None and out["version_id"] is None
    assert out["counts"] == {"rows_read": 3} and out["message"].startswith("3 ratings")
    assert night.outcome() == "night 2026-11-01 is skipped here"
