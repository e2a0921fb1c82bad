"""The training loop: probe split, early stopping, per-round records, every method end to end."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
from synthetic import mnar_logs

from tasks.engine.metrics import mae
from tasks.engine.settings import Settings
from tasks.engine.splits import heldout_mask
from tasks.engine.trainer import fit

torch.set_num_threads(1)

ROUND_KEYS = {"epoch", "reference_users", "reference_share", "adjusted_users", "calibration", "loss",
              "calibration_term", "val_mae", "seconds"}


def test_heldout_probe_ratings_never_influence_training() -> None:
    logs = mnar_logs(n_users=80, n_items=40, per_user=8, probe_users=60, seed=11)
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 3, "model.batch_size": 256})
    held = heldout_mask(logs.probe["user_id"].to_numpy(), logs.probe["item_id"].to_numpy(),
                        cfg.debias.heldout_share)
    assert 0 < held.sum() < len(held)
    changed = logs.probe.copy()
    changed.loc[held, "rating"] = 6 - changed.loc[held, "rating"]       # flip every held-out rating
    a = fit(logs.organic, logs.probe, cfg)
    b = fit(logs.organic, changed, cfg)
    for k, v in a.checkpoint.model.state_dict().items():
        assert torch.equal(v, b.checkpoint.model.state_dict()[k]), k
    assert len(a.probe_heldout) == int(held.sum()) and len(a.probe_fit) == int((~held).sum())


def test_early_stopping_restores_the_best_weights() -> None:
    logs = mnar_logs(n_users=100, n_items=40, per_user=10, probe_users=80, seed=12)
    # A large step and no weight decay overfit quickly, so validation MAE turns up and training stops.
    cfg = Settings().updated({"debias.method": "plain", "model.max_epochs": 40, "model.patience": 2,
                              "model.learning_rate": 0.2, "model.weight_decay": 0.0, "model.batch_size": 128,
                              "model.dim": 8})
    res = fit(logs.organic, logs.probe, cfg)
    vals = [r["val_mae"] for r in res.rounds]
    assert res.best_epoch < len(res.rounds) < 40                     # it stopped early, after the best
    assert res.best_epoch == int(np.argmin(vals)) + 1
    assert len(res.rounds) - res.best_epoch == cfg.model.patience
    final = res.checkpoint.score(res.probe_fit["user_id"], res.probe_fit["item_id"])[0]
    assert mae(final, res.probe_fit["rating"].to_numpy()) == pytest.approx(vals[res.best_epoch - 1], abs=1e-6)
    assert mae(final, res.probe_fit["rating"].to_numpy()) < vals[-1] - 1e-4   # not simply the last weights
    assert res.checkpoint.info["best_epoch"] == res.best_epoch


@pytest.mark.parametrize("method, extra", [
    ("plain", {}), ("probe_upweight", {}), ("ips", {}), ("snips", {}), ("recalibrate", {}),
    ("calibrated", {}), ("calibrated", {"debias.combine_with": "ips", "debias.probe_target_weight": 0.5}),
    ("per_user", {}),
])
def test_every_method_trains_and_records_rounds(method: str, extra: dict) -> None:
    logs = mnar_logs(n_users=80, n_items=40, per_user=8, probe_users=60, seed=13)
    cfg = Settings().updated({"debias.method": method, "model.max_epochs": 2, "model.batch_size": 256, **extra})
    res = fit(logs.organic, logs.probe, cfg)
    assert len(res.rounds) == 2 and all(set(r) == ROUND_KEYS for r in res.rounds)
    assert [r["epoch"] for r in res.rounds] == [1, 2]
    assert all(np.isfinite(r["loss"]) and np.isfinite(r["val_mae"]) for r in res.rounds)
    assert all(r["calibration"] == ("on" if method == "calibrated" else "off") for r in res.rounds)
    s, _ = res.checkpoint.score(logs.user_ids[:5].tolist(), logs.item_ids[:5].tolist())
    assert np.isfinite(s).all() and (s >= 1).all() and (s <= 5).all()


def test_calibration_pulls_profiles_toward_references() -> None:
    """A large weight ends with a smaller calibration term than a negligible one; weight 0 turns it off."""
    logs = mnar_logs(n_users=100, n_items=40, per_user=10, probe_users=80, seed=14)
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 6, "model.patience": 10,
                              "model.batch_size": 256})

    def last_terms(weight: float) -> float:
        res = fit(logs.organic, logs.probe, cfg.updated({"debias.calibration_weight": weight}))
        return float(np.mean([r["calibration_term"] for r in res.rounds[-3:]]))

    strong, weak = last_terms(20.0), last_terms(1e-4)
    assert strong < 0.7 * weak, (strong, weak)
    off = fit(logs.organic, logs.probe, cfg.updated({"debias.calibration_weight": 0.0}))
    assert all(r["calibration"] == "off" and r["adjusted_users"] == 0 for r in off.rounds)


def test_probe_free_training_runs_every_epoch_and_says_so() -> None:
    logs = mnar_logs(n_users=50, n_items=30, per_user=6, probe_users=0, seed=15)
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 3, "model.patience": 1,
                              "model.batch_size": 128})
    res = fit(logs.organic, pd.DataFrame(columns=["user_id", "item_id", "rating"]), cfg)
    assert len(res.rounds) == 3 and res.best_epoch == 3
    assert any("no probe ratings" in n for n in res.notes)
    assert all(r["calibration"].startswith("skipped") for r in res.rounds)


def test_all_item_profiles_fall_back_to_a_sample_over_the_memory_budget() -> None:
    logs = mnar_logs(n_users=60, n_items=40, per_user=8, probe_users=50, seed=16)
    base = {"debias.method": "calibrated", "model.max_epochs": 2, "model.batch_size": 128,
            "debias.profile_item_sample": 0}
    # Within budget: exact profiles over all 40 items, nothing to say.
    cfg = Settings().updated(base)
    res = fit(logs.organic, logs.probe, cfg)
    assert not any("memory_budget_mb" in n for n in res.notes)
    assert all(r["calibration"] == "on" for r in res.rounds)
    # 256 users x 40 items x 13 float32 per step needs ~0.5 MB: a 0.01 MB budget forces the fallback.
    cfg = Settings().updated({**base, "debias.memory_budget_mb": 0.01})
    res = fit(logs.organic, logs.probe, cfg)
    assert any("exceeds memory_budget_mb; sampling 8 items" in n for n in res.notes), res.notes
    assert all(r["calibration"] == "on" and np.isfinite(r["calibration_term"]) for r in res.rounds)


def test_trainer_applies_the_cap_and_says_so():
    logs = mnar_logs(n_users=300, n_items=60, probe_users=250, probes_per_user=6, seed=2)
    cfg = Settings().updated({"debias.method": "calibrated", "model.max_epochs": 3, "model.dim": 4,
                              "debias.max_reference_users": 5, "debias.reference_p_min": 0.5})
    res = fit(logs.organic, logs.probe, cfg)
    assert all(r["reference_users"] == 5 for r in res.rounds)
    assert any("capped at 5" in n for n in res.notes)


def test_corrected_stopping_reads_the_served_score_and_raw_reads_the_factoriser() -> None:
    logs = mnar_logs(n_users=100, n_items=40, per_user=10, probe_users=80, seed=21)
    base = Settings().updated({"debias.method": "per_user", "debias.per_user_min_probes": 10, "model.max_epochs": 6,
                               "model.patience": 2, "model.batch_size": 128, "model.dim": 4})
    pf_mae = {}
    for stop_on in ("corrected", "raw"):
        res = fit(logs.organic, logs.probe, base.updated({"model.stop_on": stop_on}))
        y = res.probe_fit["rating"].to_numpy()
        served = mae(res.checkpoint.score(res.probe_fit["user_id"], res.probe_fit["item_id"])[0], y)
        u, i = res.checkpoint.users.lookup(res.probe_fit["user_id"]), res.checkpoint.items.lookup(res.probe_fit["item_id"])
        raw = mae(np.clip(res.checkpoint.raw_scores(u, i), 1, 5), y)
        best = res.rounds[res.best_epoch - 1]["val_mae"]
        # The best round's recorded error is the error of what this fit serves, or of its raw factoriser.
        assert best == pytest.approx(served if stop_on == "corrected" else raw, abs=1e-6), stop_on
        pf_mae[stop_on] = served
        assert served != pytest.approx(raw, abs=1e-4)        # the correction does move the scores
    # Plain has no correction: both settings read the same number, so the fits are identical.
    plain = base.updated({"debias.method": "plain"})
    a, b = (fit(logs.organic, logs.probe, plain.updated({"model.stop_on": s})) for s in ("corrected", "raw"))
    assert [r["val_mae"] for r in a.rounds] == [r["val_mae"] for r in b.rounds]


def test_a_warm_start_keeps_its_base_when_every_round_is_worse() -> None:
    logs = mnar_logs(n_users=100, n_items=40, per_user=10, probe_users=80, seed=22)
    cfg = Settings().updated({"debias.method": "plain", "model.max_epochs": 30, "model.patience": 3,
                              "model.batch_size": 128, "model.dim": 4})
    first = fit(logs.organic, logs.probe, cfg)
    # A destructive step size: every fine-tune round lands far from the base's optimum.
    wild = cfg.updated({"model.learning_rate": 1.0, "model.finetune_epochs": 4, "model.keep_base": True})
    kept = fit(logs.organic, logs.probe, wild, previous=first.checkpoint)
    assert kept.best_epoch == 0 and kept.checkpoint.info["best_epoch"] == 0
    assert all(r["val_mae"] > first.rounds[first.best_epoch - 1]["val_mae"] for r in kept.rounds)
    for k, v in first.checkpoint.model.state_dict().items():
        assert torch.equal(v, kept.checkpoint.model.state_dict()[k]), k   # same ids, so same shapes
    forced = fit(logs.organic, logs.probe, wild.updated({"model.keep_base": False}), previous=first.checkpoint)
    assert forced.best_epoch >= 1                                   # the old rule: at least one round past the base
    assert mae(*[forced.checkpoint.score(forced.probe_fit["user_id"], forced.probe_fit["item_id"])[0],
                 forced.probe_fit["rating"].to_numpy()]) > mae(
        kept.checkpoint.score(kept.probe_fit["user_id"], kept.probe_fit["item_id"])[0], kept.probe_fit["rating"].to_numpy())


@pytest.mark.parametrize("method, combine_with", [("calibrated", "none"), ("snips", "none"), ("per_user", "ips")])
def test_gathering_a_round_in_chunks_gives_the_same_bits(monkeypatch, method: str, combine_with: str) -> None:
    """A round's examples are gathered a chunk of steps at a time (memory); the steps, their weights sums
    (self-normalised IPS) and so the trained weights must be exactly those of gathering the whole round."""
    import tasks.engine.trainer as trainer

    logs = mnar_logs(n_users=120, n_items=60, per_user=15, probe_users=80, seed=11)
    settings = Settings().updated({"debias.method": method, "debias.combine_with": combine_with,
                                   "model.batch_size": 64, "model.max_epochs": 3})

    def weights() -> list[torch.Tensor]:
        result = fit(logs.organic, logs.probe, settings)
        return [p.detach().clone() for p in result.checkpoint.model.parameters()] + \
            [torch.tensor(result.probe_errors.to_numpy())]

    whole = weights()                                      # default chunk: every step of this run at once
    monkeypatch.setattr(trainer, "_GATHER_ROWS", 150)      # 2 steps a chunk, and a ragged last chunk
    chunked = weights()
    assert len(logs.organic) > 20 * 64
    assert all(torch.equal(a, b) for a, b in zip(whole, chunked))
