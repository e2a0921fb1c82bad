"""Same inputs + config + seed + thread count give identical checkpoints."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
import torch
from synthetic import mnar_logs

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit


@pytest.fixture(autouse=True)
def _restore_threads() -> Iterator[None]:
    before = torch.get_num_threads()
    yield
    torch.set_num_threads(before)


def _run(threads: int, seed: int = 7, method: str = "calibrated"):
    logs = mnar_logs(n_users=90, n_items=40, per_user=10, probe_users=70, seed=21)
    cfg = Settings().updated({"debias.method": method, "model.max_epochs": 3, "model.batch_size": 128,
                              "model.threads": threads, "model.seed": seed, "debias.combine_with": "ips",
                              "debias.probe_target_weight": 0.3})
    return fit(logs.organic, logs.probe, cfg)


def _same_state(a, b) -> bool:
    sa, sb = a.checkpoint.model.state_dict(), b.checkpoint.model.state_dict()
    return sa.keys() == sb.keys() and all(torch.equal(sa[k], sb[k]) for k in sa)


def _facts(res) -> list[dict]:
    return [{k: v for k, v in r.items() if k != "seconds"} for r in res.rounds]


@pytest.mark.parametrize("threads", [1, 2])
def test_same_inputs_seed_and_threads_give_identical_checkpoints(threads: int, tmp_path: Path) -> None:
    a, b = _run(threads), _run(threads)
    assert _same_state(a, b)
    assert _facts(a) == _facts(b)
    assert torch.get_num_threads() == threads
    # The saved files are identical too (model weights, id maps, meta).
    a.checkpoint.save(tmp_path / "a")
    b.checkpoint.save(tmp_path / "b")
    for name in ("users.parquet", "items.parquet", "meta.json"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
    sa = Checkpoint.load(tmp_path / "a").model.state_dict()
    sb = Checkpoint.load(tmp_path / "b").model.state_dict()
    assert all(torch.equal(sa[k], sb[k]) for k in sa)


def test_a_different_seed_gives_a_different_model() -> None:
    assert not _same_state(_run(1, seed=7), _run(1, seed=8))


def test_one_versus_two_threads() -> None:
    # Whether 1 and 2 threads differ (measured on torch 2.13 CPU, this machine):
    # - at this test's size (~900 ratings) the checkpoints are bit-identical: the kernels involved stay
    #   below torch's parallelisation thresholds, so the second thread never splits a sum;
    # - at 100k ratings (bench/bench_engine.py's generator, one calibrated round) they DIFFER in the last
    #   bits: max |weight difference| ~2e-4, because a parallel reduction adds in another order.
    # So the reproducibility contract is "same inputs + seed + thread count", as model.threads says.
    # What must hold whatever the thread count: both runs train the same model up to rounding noise.
    a, b = _run(1), _run(2)
    sa, sb = a.checkpoint.model.state_dict(), b.checkpoint.model.state_dict()
    assert max(float((sa[k] - sb[k]).abs().max()) for k in sa) <= 1e-3
