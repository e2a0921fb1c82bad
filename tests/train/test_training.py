"""The nightly training unit: the candidate trains under the configured method, the shadow model beside
it under the same settings made plain."""

from __future__ import annotations

import pandas as pd
import torch

from synthetic import mnar_logs
from tasks.config import Config
from tasks.engine.trainer import fit
from tasks.train.settings import engine_settings
from tasks.train.training import split_sources, train_night


def _window():
    logs = mnar_logs(n_users=60, n_items=30, per_user=8, probe_users=40, seed=8)
    window = pd.concat([logs.organic.assign(source="organic"), logs.probe.assign(source="probe")],
                       ignore_index=True).sample(frac=1.0, random_state=0)      # sources interleaved
    return logs, window


def test_split_sources_keeps_each_source_in_order() -> None:
    logs, window = _window()
    organic, probe = split_sources(window)
    assert list(organic.columns) == ["user_id", "item_id", "rating"] and len(organic) == len(logs.organic)
    assert len(probe) == len(logs.probe)
    expected = window[window["source"] == "organic"][["user_id", "item_id", "rating"]].reset_index(drop=True)
    pd.testing.assert_frame_equal(organic, expected)


def test_the_shadow_is_the_candidate_made_plain() -> None:
    logs, window = _window()
    cfg = Config().updated({"debias.method": "calibrated", "debias.combine_with": "ips", "model.max_epochs": 2,
                            "model.dim": 4, "model.batch_size": 128})
    night = train_night(window, cfg, None, None)
    assert night.candidate.checkpoint.method == "calibrated+ips"
    assert night.shadow.checkpoint.method == "plain"
    # The same data and every other setting: the shadow is fit() with only the method (and companion) changed.
    organic, probe = split_sources(window)
    plain = fit(organic, probe, engine_settings(cfg.updated({"debias.method": "plain",
                                                             "debias.combine_with": "none"})))
    for name, value in plain.checkpoint.model.state_dict().items():
        assert torch.equal(night.shadow.checkpoint.model.state_dict()[name], value), name
    assert train_night(window, cfg.updated({"runtime.shadow": False}), None, None).shadow is None
