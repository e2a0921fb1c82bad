"""Held-out evaluation: typed results that give exactly the engine's dicts, on a real trained model.

Invented selection-skewed logs (tests/synthetic.py); every number is invented.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import torch
from synthetic import mnar_logs

from tasks.config import Config
from tasks.engine.metrics import segmented_errors
from tasks.engine.trainer import fit
from tasks.evaluate.evaluation import Evaluation, ModelErrors, evaluate_models
from tasks.evaluate.segments import user_skew_segments
from tasks.train.settings import engine_settings

torch.set_num_threads(1)


@pytest.fixture(scope="module")
def trained():
    logs = mnar_logs(n_users=80, n_items=40, per_user=8, probe_users=60, seed=21)
    cfg = Config().updated({"debias.method": "plain", "model.max_epochs": 2, "model.batch_size": 256,
                            "evaluate.bootstrap": 50})
    window = pd.concat([logs.organic.assign(source="organic"), logs.probe.assign(source="probe")],
                       ignore_index=True)
    return cfg, window, fit(logs.organic, logs.probe, engine_settings(cfg))


def test_evaluation_equals_the_engine_errors_per_model(trained):
    cfg, window, res = trained
    heldout = res.probe_heldout
    segments = user_skew_segments(window, cfg.evaluate.skew_margin).iloc[::2]  # half the users: rest "unknown"
    ev = evaluate_models(heldout, segments, res.checkpoint, None, res.checkpoint, cfg.evaluate, seed=5)
    pred, _ = res.checkpoint.score(heldout["user_id"], heldout["item_id"])
    seg = heldout["user_id"].map(segments).fillna("unknown").to_numpy()
    ref = segmented_errors(pred, heldout["rating"].to_numpy(float), seg, 50, cfg.evaluate.confidence, 5)
    assert ev.shadow is None
    assert ev.candidate.to_dict() == ref and ev.live.to_dict() == ref  # same pairs, same seed: comparable
    # key order too, so JSON written without sorting is unchanged
    assert json.dumps(ev.candidate.to_dict()) == json.dumps(ref)
    assert ev.to_dict() == {"candidate": ref, "shadow": None, "live": ref}
    assert ev.candidate.n == len(heldout) > 0 and "unknown" in ev.candidate.segments
    # the MAE by hand: mean absolute error over the held-out probe ratings (stars)
    assert ev.candidate.mae == pytest.approx(float(np.mean(np.abs(pred - heldout["rating"].to_numpy(float)))))
    assert ev.candidate.mae_lo <= ev.candidate.mae <= ev.candidate.mae_hi


def test_typed_errors_round_trip_the_engine_dict():
    d = {"n": 3, "mae": 0.5, "rmse": 0.6, "mae_lo": math.nan, "mae_hi": math.nan, "rmse_lo": math.nan,
         "rmse_hi": math.nan, "segments": {"up": {"n": 2, "mae": 0.4, "rmse": 0.5, "mae_lo": 0.3, "mae_hi": 0.5,
                                                   "rmse_lo": 0.4, "rmse_hi": 0.6}}}
    e = ModelErrors.from_dict(d)
    assert e.segments["up"].mae == 0.4 and math.isnan(e.mae_lo)
    assert json.dumps(e.to_dict()) == json.dumps(d)
    assert list(Evaluation(e).models()) == ["candidate", "shadow", "live"]
