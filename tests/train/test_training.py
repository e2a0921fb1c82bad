"""The nightly training unit: the candidate trains under the configured method, the shadow model beside
it under the same settings made plain."""

from __future__ import annotations

import pandas as pd
import torch

from synthetic import mnar_logs
from tasks.config import Config
from tasks.engine.trainer import fit
from tasks.train.settings import engine_settings
from tasks.train.training import probe_fit_mae, split_sources, train_night


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


def _state_equal(a, b) -> bool:
    sa, sb = a.model.state_dict(), b.model.state_dict()
    return all(torch.equal(v, sb[k]) for k, v in sa.items())


def test_refit_every_starts_cold_after_that_many_warm_nights() -> None:
    _, window = _window()
    cfg = Config().updated({"model.max_epochs": 3, "model.finetune_epochs": 2, "model.dim": 4,
                            "model.batch_size": 128, "model.refit_every": 3})
    night, chain = None, []
    for _ in range(5):
        base = night.candidate.checkpoint if night else None
        shadow = night.shadow.checkpoint if night else None
        night = train_night(window, cfg, base, shadow)
        chain.append(night)
    # cold, warm 1, warm 2, cold refit (3 nights since the cold fit), warm 1
    assert [n.candidate.checkpoint.info["warm_nights"] for n in chain] == [0, 1, 2, 0, 1]
    assert [n.candidate.checkpoint.info["warm_start"] for n in chain] == [False, True, True, False, True]
    assert any("model.refit_every" in note for note in chain[3].candidate.notes)
    # The refit night is a cold fit on the window: the same weights as the first night (same data and seed),
    # for the candidate and for its shadow.
    assert _state_equal(chain[3].candidate.checkpoint, chain[0].candidate.checkpoint)
    assert _state_equal(chain[3].shadow.checkpoint, chain[0].shadow.checkpoint)
    never = cfg.updated({"model.refit_every": 0})
    assert train_night(window, never, chain[2].candidate.checkpoint, None).candidate.checkpoint.info["warm_nights"] == 3


def test_a_cold_candidate_is_kept_only_when_its_probe_fit_error_is_lower() -> None:
    _, window = _window()
    cfg = Config().updated({"model.max_epochs": 3, "model.finetune_epochs": 2, "model.dim": 4,
                            "model.batch_size": 128, "runtime.shadow": False})
    first = train_night(window, cfg, None, None).candidate
    both = cfg.updated({"model.cold_candidate": True})
    for lr in (0.02, 1.0):    # 1.0: a destructive fine-tune, so the cold model must win
        tuned = both.updated({"model.learning_rate": lr, "model.keep_base": False})
        night = train_night(window, tuned, first.checkpoint, None).candidate
        warm = train_night(window, tuned.updated({"model.cold_candidate": False}), first.checkpoint, None).candidate
        cold = train_night(window, tuned, None, None).candidate
        kept = cold if probe_fit_mae(cold) < probe_fit_mae(warm) else warm
        assert _state_equal(night.checkpoint, kept.checkpoint), lr
        assert probe_fit_mae(night) == min(probe_fit_mae(cold), probe_fit_mae(warm))
        assert night.checkpoint.info["warm_nights"] == (0 if kept is cold else 1)
    assert kept is cold          # at lr 1.0
    # Reproducible: the same night twice gives the same model.
    again = train_night(window, tuned, first.checkpoint, None).candidate
    assert _state_equal(again.checkpoint, night.checkpoint)
