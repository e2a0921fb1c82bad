"""Data-parallel training through the gloo exchange: one worker must be single-process fit() bit for bit,
for every method. (Two workers launched by torchrun: tests/train/test_torchrun.py; the exchange's
collectives between two processes: tests/engine/test_exchange.py.)"""

from __future__ import annotations

import pandas as pd
import pytest
import torch
import torch.distributed as dist
from synthetic import mnar_logs

from tasks.engine.distributed import GlooExchange, fit_distributed
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit


@pytest.fixture(scope="module")
def logs():
    # Invented selection-skewed logs (tests/synthetic.py): 3,200 organic ratings of 400 members on 80 titles.
    return mnar_logs(n_users=400, n_items=80, per_user=8, probe_users=300, probes_per_user=4, seed=3)


@pytest.fixture
def one_worker_group():
    """A real gloo process group of one worker in this process (no launcher needed)."""
    dist.init_process_group("gloo", store=dist.HashStore(), rank=0, world_size=1)
    yield
    dist.destroy_process_group()


def test_refuses_without_a_process_group(logs):
    with pytest.raises(RuntimeError, match="torchrun"):
        fit_distributed(logs.organic, logs.probe, Settings())
    with pytest.raises(RuntimeError, match="tasks.train.torchrun"):
        GlooExchange()


def _rounds(res) -> pd.DataFrame:
    return pd.DataFrame([{k: v for k, v in r.items() if k != "seconds"} for r in res.rounds])


@pytest.mark.parametrize("method, extra", [
    ("plain", {}), ("probe_upweight", {}), ("ips", {}), ("snips", {}), ("recalibrate", {}),
    ("calibrated", {}), ("per_user", {}),
    ("calibrated", {"debias.combine_with": "snips", "debias.probe_target_weight": 0.5}),
    ("calibrated", {"debias.combine_with": "probe_upweight", "debias.max_reference_users": 4,
                    "debias.reference_p_min": 0.5}),
    ("per_user", {"debias.combine_with": "ips", "debias.per_user_design": "skew_offset"}),
])
def test_one_worker_reproduces_the_single_process_trainer(logs, one_worker_group, method, extra):
    """World size 1: the same loop, batches and random streams, so data-parallel training must be fit()
    bit for bit: every round's figures, the notes, the final weights and the post-hoc correction."""
    settings = Settings().updated({"model.dim": 8, "model.max_epochs": 3, "model.batch_size": 512,
                                   "debias.method": method, **extra})
    res, facts = fit_distributed(logs.organic, logs.probe, settings)
    single = fit(logs.organic, logs.probe, settings)
    assert facts.world == 1 and facts.rank == 0
    upweighted = "probe_upweight" in (method, extra.get("debias.combine_with"))
    assert facts.ratings == len(logs.organic) + (len(single.probe_fit) if upweighted else 0)
    pd.testing.assert_frame_equal(_rounds(res), _rounds(single), check_exact=True)
    assert res.notes == single.notes
    if method == "calibrated":
        assert all(r["calibration"] == "on" for r in res.rounds)
        assert facts.reference_draws == [r["reference_users"] for r in res.rounds]
    for name, value in single.checkpoint.model.state_dict().items():
        assert torch.equal(res.checkpoint.model.state_dict()[name], value), name
    held = single.probe_heldout
    assert (res.checkpoint.score(held["user_id"], held["item_id"])[0]
            == single.checkpoint.score(held["user_id"], held["item_id"])[0]).all()
    assert res.checkpoint.info == {**single.checkpoint.info, "world_size": 1}


def test_one_worker_reproduces_a_warm_start(logs, one_worker_group):
    settings = Settings().updated({"model.dim": 8, "model.max_epochs": 2, "model.finetune_epochs": 2,
                                   "model.batch_size": 512, "debias.method": "calibrated"})
    first = fit(logs.organic.iloc[:2000], logs.probe.iloc[:600], settings).checkpoint
    res, _ = fit_distributed(logs.organic, logs.probe, settings, previous=first)
    single = fit(logs.organic, logs.probe, settings, previous=first)
    assert res.new_users == single.new_users > 0
    pd.testing.assert_frame_equal(_rounds(res), _rounds(single), check_exact=True)
    for name, value in single.checkpoint.model.state_dict().items():
        assert torch.equal(res.checkpoint.model.state_dict()[name], value), name
