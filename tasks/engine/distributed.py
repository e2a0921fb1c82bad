"""Data-parallel training with ``torch.distributed`` (gloo on CPU): the exchange between workers.

Launched by ``torchrun`` through the train stage's entry point (``tasks/train/torchrun.py``)::

    torchrun --nproc-per-node 2 -m tasks.train.torchrun --ratings window.parquet --out run/

Every worker (rank) holds a full replica of the model and the ratings of 1/W of the users (user index
mod W): organic and probe ratings are sharded by user. The training loop is the single-process one
(:class:`tasks.engine.trainer.Training`); :class:`GlooExchange` is what it exchanges. Per step, each rank
computes the loss of its own slice of the global mini-batch, normalised by the *global* batch size (or,
for self-normalised IPS, the global weight sum); the sparse embedding gradients are then summed across
ranks (:func:`sum_gradients`) and every rank takes the same optimiser step, so the replicas stay
identical. Per round, each rank draws reference users among its own users and computes their profiles;
``all_gather`` gives every rank all reference profiles, so an adjusted user is pulled toward the nearest
reference users wherever they live. Probe errors and the validation MAE for early stopping are computed
per shard and summed, so every rank makes the same stopping decision.

Same objective as :func:`tasks.engine.trainer.fit`: the same number of steps per round, each over
(about) ``model.batch_size`` ratings in total, the same calibration weighting per round. What differs is
which ratings share a step (each step takes a slice from every shard) and the random streams (shuffles,
reference draws, item samples are per rank): the result is like training with another seed, which is the
tolerance the tests allow (tests/engine/test_distributed.py). Rank 0 keeps the single-process random
streams and batch sizes, so with one worker the result is :func:`~tasks.engine.trainer.fit`'s, bit for bit.

Every rank reads the whole window and keeps its shard (simple; memory per rank is that of the whole
window). Imports no Prefect and nothing of the pipeline.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
import torch
import torch.distributed as dist

from tasks.engine.checkpoint import Checkpoint
from tasks.engine.exchange import Exchange
from tasks.engine.settings import Settings
from tasks.engine.trainer import FitResult, Training


@dataclass
class ExchangeMeter:
    """What this rank's collectives moved: ``calls``, ``bytes_in`` (bytes this rank received: every
    rank's padded part of each all_gather, and W x the tensor of each all_reduce, a ring's upper bound
    counted the same way), ``seconds`` spent inside them (waiting for slower ranks included)."""

    calls: int = 0
    bytes_in: int = 0
    seconds: float = 0.0

    def add(self, nbytes: int, seconds: float) -> None:
        self.calls += 1
        self.bytes_in += int(nbytes)
        self.seconds += seconds


#: This process's meter (one process is one rank); read by tasks/train/torchrun.py into metrics.json.
METER = ExchangeMeter()


def owner(user_idx: np.ndarray, world: int) -> np.ndarray:
    """Rank that holds each user's ratings: user index mod world size (balanced for many users)."""
    return np.asarray(user_idx, np.int64) % world


def all_gather_parts(x: torch.Tensor) -> list[torch.Tensor]:
    """Every rank's ``[R_r, ...]`` tensor, in rank order (ranks may hold different R_r)."""
    world = dist.get_world_size()
    t0 = time.perf_counter()
    counts = [torch.zeros(1, dtype=torch.int64) for _ in range(world)]
    dist.all_gather(counts, torch.tensor([x.shape[0]], dtype=torch.int64))
    sizes = [int(c.item()) for c in counts]
    padded = torch.zeros((max(sizes), *x.shape[1:]), dtype=x.dtype)
    padded[: x.shape[0]] = x
    parts = [torch.empty_like(padded) for _ in range(world)]
    dist.all_gather(parts, padded)
    METER.add(world * (8 + padded.numel() * padded.element_size()), time.perf_counter() - t0)
    return [p[:n] for p, n in zip(parts, sizes)]


def sum_gradients(model: torch.nn.Module) -> None:
    """Replace each parameter's gradient by its sum over ranks; afterwards every rank holds the same
    (coalesced, sparse) gradients.

    The embedding gradients are sparse (only the rows a step touched). Rather than one sparse
    ``all_reduce`` per table, every rank packs all its tables' rows into one float64 buffer (indices are
    exact below 2**53, float32 values exactly representable) and one ``all_gather`` (plus one for the
    sizes) moves them. Measured with 2 local workers on 2 cores: a 12-round training run took 8.6 s
    instead of 22 s with four sparse all-reduces per step, with the same result. Rows are summed in rank
    order, the same on every rank.
    """
    params = list(model.parameters())
    header, chunks = [], []
    for p in params:
        g = p.grad
        if g is None:
            idx, val = torch.zeros(0, dtype=torch.int64), torch.zeros((0, *p.shape[1:]))
        elif g.is_sparse:
            g = g.coalesce()
            idx, val = g.indices()[0], g.values()
        else:
            idx, val = torch.arange(p.shape[0]), g
        header.append(len(idx))
        chunks += [idx.double(), val.reshape(-1).double()]
    flat = torch.cat([torch.tensor(header, dtype=torch.float64), *chunks])
    per_param: list[tuple[list, list]] = [([], []) for _ in params]
    for buf in all_gather_parts(flat):
        nnz = buf[: len(params)].long().tolist()
        pos = len(params)
        for k, p in enumerate(params):
            width = int(np.prod(p.shape[1:])) if p.dim() > 1 else 1
            per_param[k][0].append(buf[pos:pos + nnz[k]].long())
            pos += nnz[k]
            per_param[k][1].append(buf[pos:pos + nnz[k] * width].to(p.dtype).view(nnz[k], *p.shape[1:]))
            pos += nnz[k] * width
    for p, (idx, val) in zip(params, per_param):
        p.grad = torch.sparse_coo_tensor(torch.cat(idx).view(1, -1), torch.cat(val), p.shape,
                                         check_invariants=False).coalesce()


class GlooExchange(Exchange):
    """The exchange of an initialised ``torch.distributed`` process group (gloo on CPU): every worker
    owns the users whose index mod W is its rank."""

    def __init__(self) -> None:
        if not dist.is_initialized():
            raise RuntimeError("data-parallel training needs torch.distributed initialised (launch with torchrun: "
                               "torchrun --nproc-per-node N -m tasks.train.torchrun ...)")
        self.rank, self.world = dist.get_rank(), dist.get_world_size()

    def owns(self, user_idx: np.ndarray) -> np.ndarray:
        return owner(user_idx, self.world) == self.rank

    def sizes(self, n: int) -> list[int]:
        return [int(x) for x in self.gather_rows(torch.tensor([n], dtype=torch.int64))]

    def gather_rows(self, x: torch.Tensor) -> torch.Tensor:
        return torch.cat(all_gather_parts(x))

    def sum(self, *values: float) -> list[float]:
        t = torch.tensor(values, dtype=torch.float64)
        t0 = time.perf_counter()
        dist.all_reduce(t)
        METER.add(self.world * t.numel() * 8, time.perf_counter() - t0)
        return t.tolist()

    def sum_gradients(self, model: torch.nn.Module) -> None:
        # One worker: its gradient is the sum already. (Packing would also coalesce it, which changes the
        # order in which RowAdam adds a repeated row's entries, so one worker would no longer be fit().)
        if self.world > 1:
            sum_gradients(model)


@dataclass
class ShardFacts:
    """What one rank trained on (for logs and tests)."""

    rank: int
    world: int
    ratings: int
    users: int
    probe_fit: int
    reference_draws: list[int]      # reference users this rank drew, per round
    weights_sha256: str             # of the final model's weights: equal on every rank
    steps_per_round: int = 0        # mini-batch steps (each with one gradient exchange) per round


def fit_distributed(organic: pd.DataFrame, probe: pd.DataFrame | None, settings: Settings,
                    previous: Checkpoint | None = None, log: Callable[[str], None] | None = None,
                    batch_per_worker: bool = False) -> tuple[FitResult, ShardFacts]:
    """Train on this rank's shard inside an initialised process group; every rank returns the same model.

    ``organic``/``probe``: the *whole* window (every rank reads it; each keeps its users). Same inputs and
    result as :func:`tasks.engine.trainer.fit` (round dicts carry global figures; the checkpoint's info
    adds ``world_size``), plus this rank's facts.

    ``batch_per_worker``: every worker takes ``model.batch_size`` ratings per step, so a step covers W times
    as many ratings and a round takes W times fewer steps (and collectives). The usual way to make data
    parallelism pay when a step's communication costs as much as its arithmetic, but a different objective
    (larger batches); off by default so results match single-process training.
    """
    training = Training(organic, probe, settings, previous, GlooExchange(), log, batch_per_worker)
    result = training.run()
    world = training.exchange.world
    result.checkpoint.info["world_size"] = world
    digest = hashlib.sha256()
    for name, value in sorted(training.model.state_dict().items()):
        digest.update(name.encode() + value.detach().contiguous().numpy().tobytes())
    return result, ShardFacts(training.exchange.rank, world, len(training.T_r), len(training.active_users),
                              len(training.pf_r), training.reference_draws, digest.hexdigest(),
                              training.n_steps)
