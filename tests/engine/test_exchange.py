"""The exchange between training workers: the single-process one does nothing; the gloo one, in two real
processes (torch.multiprocessing, gloo over 127.0.0.1), gathers, sums and keeps replicas identical."""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp
from synthetic import mnar_logs
from torch import nn

from tasks.engine.distributed import GlooExchange, fit_distributed, owner
from tasks.engine.exchange import Exchange
from tasks.engine.settings import Settings
from tasks.engine.trainer import fit


def test_the_single_process_exchange_returns_its_inputs() -> None:
    ex = Exchange()
    assert (ex.rank, ex.world) == (0, 1)
    users = np.array([5, 2, 9])
    assert users[ex.owns(users)].base is users                  # every row, and no copy
    x = torch.arange(6.0).view(3, 2)
    assert ex.gather_rows(x) is x
    assert ex.sizes(17) == [17]
    assert ex.sum(1.5, 2.0) == [1.5, 2.0]
    table = nn.Embedding(4, 2, sparse=True)
    table(torch.tensor([1, 1, 3])).sum().backward()
    grad = table.weight.grad
    ex.sum_gradients(table)
    assert table.weight.grad is grad and not grad.is_coalesced()   # left as it is (RowAdam sums it itself)


def test_users_are_sharded_by_index_mod_world() -> None:
    assert owner(np.array([0, 1, 2, 3, 7]), 2).tolist() == [0, 1, 0, 1, 1]
    assert owner(np.array([0, 1, 2, 3, 7]), 1).tolist() == [0, 0, 0, 0, 0]


#: Invented logs (tests/synthetic.py) and settings of the two-worker training run: one step per round
#: (the batch holds every rating), self-normalised IPS.
LOGS = dict(n_users=120, n_items=40, per_user=8, probe_users=90, seed=9)
FULL_BATCH = Settings().updated({"debias.method": "snips", "model.dim": 4, "model.max_epochs": 4,
                                 "model.patience": 10, "model.batch_size": 10_000})


@pytest.fixture(scope="module")
def two_workers(tmp_path_factory) -> list[dict]:
    """What each of two processes sharing a gloo group returned (one start of both: starting processes
    costs more than the work)."""
    folder = tmp_path_factory.mktemp("gloo")
    mp.spawn(_entry, args=(str(folder),), nprocs=2, join=True)
    return [pickle.loads((folder / f"rank{r}.pkl").read_bytes()) for r in range(2)]


def _entry(rank: int, folder: str) -> None:
    torch.set_num_threads(1)
    store = dist.FileStore(str(Path(folder) / "store"), 2)
    dist.init_process_group("gloo", store=store, rank=rank, world_size=2)
    try:
        out = {"collectives": _collectives(rank, GlooExchange()), "training": _train()}
        dist.barrier()
    finally:
        dist.destroy_process_group()
    (Path(folder) / f"rank{rank}.pkl").write_bytes(pickle.dumps(out))


def _collectives(rank: int, ex: GlooExchange) -> dict:
    rows = torch.full((2 + rank, 3), float(rank))                  # ranks hold different row counts
    table = nn.Embedding(6, 2, sparse=True)
    with torch.no_grad():
        table.weight.copy_(torch.arange(12.0).view(6, 2))
    # Rank 0 touches rows 1 (twice) and 4; rank 1 touches rows 4 and 5; loss weights differ per rank.
    idx = torch.tensor([[1, 1, 4], [4, 5, 5]][rank])
    ((rank + 1.0) * table(idx) ** 2).sum().backward()
    ex.sum_gradients(table)
    return {"rank": ex.rank, "world": ex.world, "gathered": ex.gather_rows(rows), "sizes": ex.sizes(10 * rank + 1),
            "sum": ex.sum(0.25 + rank, 1.0), "empty": ex.gather_rows(torch.zeros((0, 3)) if rank else rows[:1]),
            "grad": table.weight.grad.to_dense(), "coalesced": table.weight.grad.is_coalesced()}


def test_gloo_collectives_between_two_processes(two_workers) -> None:
    a, b = (w["collectives"] for w in two_workers)
    assert (a["rank"], b["rank"], a["world"]) == (0, 1, 2)
    for r in (a, b):
        assert torch.equal(r["gathered"], torch.tensor([[0.0] * 3] * 2 + [[1.0] * 3] * 3))   # rank order
        assert r["sizes"] == [1, 11]
        assert r["sum"] == [1.5, 2.0]                  # 0.25 + 1.25, 1 + 1
        assert torch.equal(r["empty"], torch.zeros((1, 3)))
        assert r["coalesced"]
    # Reference: the gradient of the summed loss, written out: d/dw (c * w^2) = 2 c w per lookup.
    w = torch.arange(12.0).view(6, 2)
    expected = torch.zeros(6, 2)
    expected[1] = 2 * 2 * w[1]                    # rank 0 (c = 1), looked up twice
    expected[4] = 2 * w[4] + 2 * 2 * w[4]         # rank 0 (c = 1) and rank 1 (c = 2)
    expected[5] = 2 * 2 * 2 * w[5]                # rank 1 (c = 2), twice
    assert torch.equal(a["grad"], expected) and torch.equal(b["grad"], expected)


def _train() -> dict:
    logs = mnar_logs(**LOGS)
    res, facts = fit_distributed(logs.organic, logs.probe, FULL_BATCH)
    return {"state": res.checkpoint.model.state_dict(), "rounds": res.rounds, "ratings": facts.ratings}


def test_two_workers_take_the_full_batch_step_of_one(two_workers) -> None:
    """With one step per round covering every rating, two workers' summed loss is the single-process loss
    whatever the sharding: the same weights up to float summation order. Self-normalised IPS divides by the
    weight sum over both workers, so this fails if a worker used its own sum."""
    logs = mnar_logs(**LOGS)
    a, b = (w["training"] for w in two_workers)
    single = fit(logs.organic, logs.probe, FULL_BATCH)
    assert a["ratings"] + b["ratings"] == len(logs.organic) and min(a["ratings"], b["ratings"]) > 0
    for name, value in single.checkpoint.model.state_dict().items():
        assert torch.equal(a["state"][name], b["state"][name]), name          # replicas stay identical
        torch.testing.assert_close(a["state"][name], value, rtol=0, atol=1e-5)
    assert [r["loss"] for r in a["rounds"]] == pytest.approx([r["loss"] for r in single.rounds], rel=1e-5)
