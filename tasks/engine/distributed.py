"""Data-parallel training with ``torch.distributed`` (gloo on CPU), launched by ``torchrun``.

    torchrun --nproc-per-node 2 -m tasks.engine.distributed --ratings window.parquet --out run/
    torchrun --nnodes 4 --nproc-per-node 8 --rdzv-backend c10d --rdzv-endpoint host:29400 \\
        -m tasks.engine.distributed --config tarewise.toml --run-date 2026-11-30 --out run/

Every worker (rank) holds a full replica of the model and the ratings of 1/W of the users (user index
mod W): organic and probe ratings are sharded by user. Per step, each rank computes the loss of its own
slice of the global mini-batch with the single-process trainer's step code
(:func:`tasks.engine.trainer.step_loss`), normalised by the *global* batch size; the sparse embedding
gradients are then summed across ranks (:func:`sum_gradients`) and every rank takes the same optimiser
step (:class:`tasks.engine.row_adam.RowAdam`, as in the trainer), so the replicas stay identical. Per round, each rank draws reference users among its own users and computes
their profiles; ``all_gather`` gives every rank all reference profiles, so an adjusted user is pulled
toward the nearest reference users wherever they live. Probe errors and the validation MAE for early
stopping are computed per shard and summed, so every rank makes the same stopping decision.

Same objective as :func:`tasks.engine.trainer.fit`: the same number of steps per round, each over
(about) ``model.batch_size`` ratings in total, the same calibration weighting per round. What differs is
which ratings share a step (each step takes a slice from every shard) and the random streams (shuffles,
reference draws, item samples are per rank): the result is like training with another seed, which is the
tolerance the tests allow (tests/test_distributed.py). Rank 0 keeps the trainer's own random streams and
batch sizes, so with one worker the result is :func:`~tasks.engine.trainer.fit`'s, bit for bit.

Every rank reads the whole window and keeps its shard (simple; memory per rank is that of the whole
window). Imports no Prefect.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import torch
import torch.distributed as dist

from tasks.config import DebiasConfig, ModelConfig, ScaleConfig
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.profiles import ProfileSampler, empirical_cdf
from tasks.engine.reference import cap_reference_users, draw_reference_users, probe_errors, reference_probabilities
from tasks.engine.row_adam import RowAdam
from tasks.engine.splits import heldout_mask
from tasks.engine.trainer import (REQUIRED, EarlyStopping, EngineInputError, FitResult, StepCalibration, _check_frame,
                      combined_with, finish_checkpoint, prepare_model, step_loss, training_examples)

#: Methods whose training this module runs. ``snips`` needs the global weight sum of every step (one more
#: collective per step) and is not done yet.
SUPPORTED = ("plain", "calibrated", "per_user", "ips", "probe_upweight", "recalibrate")


# ---------------------------------------------------------------------------------------------
# Collectives
# ---------------------------------------------------------------------------------------------

def owner(user_idx: np.ndarray, world: int) -> np.ndarray:
    """Rank that holds each user's ratings: user index mod world size (balanced for many users)."""
    return np.asarray(user_idx, np.int64) % world


def all_gather_parts(x: torch.Tensor) -> list[torch.Tensor]:
    """Every rank's ``[R_r, ...]`` tensor, in rank order (ranks may hold different R_r)."""
    world = dist.get_world_size()
    counts = [torch.zeros(1, dtype=torch.int64) for _ in range(world)]
    dist.all_gather(counts, torch.tensor([x.shape[0]], dtype=torch.int64))
    sizes = [int(c.item()) for c in counts]
    padded = torch.zeros((max(sizes), *x.shape[1:]), dtype=x.dtype)
    padded[: x.shape[0]] = x
    parts = [torch.empty_like(padded) for _ in range(world)]
    dist.all_gather(parts, padded)
    return [p[:n] for p, n in zip(parts, sizes)]


def all_gather_rows(x: torch.Tensor) -> torch.Tensor:
    """Concatenate every rank's ``[R_r, K]`` tensor in rank order."""
    return torch.cat(all_gather_parts(x))


def all_sum(*values: float) -> list[float]:
    """Sum scalars across ranks (float64)."""
    t = torch.tensor(values, dtype=torch.float64)
    dist.all_reduce(t)
    return t.tolist()


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


# ---------------------------------------------------------------------------------------------
# Training
# ---------------------------------------------------------------------------------------------

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


def fit_distributed(organic: pd.DataFrame, probe: pd.DataFrame, scale: ScaleConfig, model_cfg: ModelConfig,
                    debias: DebiasConfig, previous: Checkpoint | None = None,
                    log: Callable[[str], None] | None = None,
                    batch_per_worker: bool = False) -> tuple[FitResult, ShardFacts]:
    """Train on this rank's shard inside an initialised process group; every rank returns the same model.

    ``organic``/``probe``: the *whole* window (every rank reads it; each keeps its users). Same inputs and
    result as :func:`tasks.engine.trainer.fit` (round dicts carry global figures), plus this rank's facts.

    ``batch_per_worker``: every worker takes ``model.batch_size`` ratings per step, so a step covers W times
    as many ratings and a round takes W times fewer steps (and collectives). The usual way to make data
    parallelism pay when a step's communication costs as much as its arithmetic, but a different objective
    (larger batches); off by default so results match single-process training.
    """
    if not dist.is_initialized():
        raise RuntimeError("fit_distributed needs torch.distributed initialised (launch with torchrun)")
    rank, world = dist.get_rank(), dist.get_world_size()
    say = log or (lambda _msg: None)
    method = debias.method
    if method not in SUPPORTED:
        raise EngineInputError(f"debias.method = {method!r} is not supported by data-parallel training "
                               f"(supported: {', '.join(SUPPORTED)})")
    combine = combined_with(debias)
    if combine == "snips":
        raise EngineInputError("debias.combine_with = 'snips' is not supported by data-parallel training")
    organic = _check_frame(organic, "organic", scale)
    probe = _check_frame(probe if probe is not None else pd.DataFrame(columns=REQUIRED), "probe", scale)
    if organic.empty:
        raise EngineInputError("organic ratings: empty, nothing to train on")
    torch.set_num_threads(model_cfg.threads)
    torch.use_deterministic_algorithms(True)
    # The same generator as the single-process trainer for everything every rank must agree on (id maps
    # are sorted, initial weights); per-rank streams afterwards.
    gen = torch.Generator().manual_seed(model_cfg.seed)
    notes: list[str] = []

    users, items, new_users, new_items, model, epochs = prepare_model(organic, probe, model_cfg, previous, gen,
                                                                      notes)
    if rank > 0:
        # Rank 0 keeps the single-process streams, so one worker reproduces fit() exactly (tested).
        gen = torch.Generator().manual_seed(model_cfg.seed * 1_000_003 + 7919 * rank)
    rng = np.random.default_rng(model_cfg.seed if rank == 0 else [model_cfg.seed, rank])

    held = heldout_mask(probe["user_id"].to_numpy(), probe["item_id"].to_numpy(), debias.heldout_share)
    probe_fit, probe_heldout = probe[~held].reset_index(drop=True), probe[held].reset_index(drop=True)
    all_pf_u, all_pf_i = users.lookup(probe_fit["user_id"]), items.lookup(probe_fit["item_id"])
    all_pf_r = probe_fit["rating"].to_numpy(dtype=float, copy=True)
    mine_pf = owner(all_pf_u, world) == rank
    pf_u, pf_i, pf_r = torch.from_numpy(all_pf_u[mine_pf]), torch.from_numpy(all_pf_i[mine_pf]), all_pf_r[mine_pf]

    tr_u, tr_i, tr_r, tr_w, _ = training_examples(organic, users, items, all_pf_u, all_pf_i, all_pf_r, scale, debias,
                                                  notes, weightings=("ips",))
    n_total = len(tr_r)
    mine = owner(tr_u, world) == rank
    T_u, T_i = torch.from_numpy(tr_u[mine]), torch.from_numpy(tr_i[mine])
    T_r, T_w = torch.from_numpy(tr_r[mine]).float(), torch.from_numpy(tr_w[mine]).float()
    n_local = len(T_r)
    # Global steps as in the single-process trainer; every rank takes the same number of steps, each over
    # its share of the step's ratings. The step's global rating count is known from every rank's size.
    sizes = [int(x) for x in all_gather_rows(torch.tensor([[n_local]], dtype=torch.int64)).view(-1)]
    bs = min(model_cfg.batch_size, n_total)
    n_steps = -(-max(sizes) // bs) if batch_per_worker else -(-n_total // bs)
    # ceil(share * batch): every shard is through within n_steps, and one worker takes exactly fit()'s batches.
    local_bs = [-(-s // n_steps) if batch_per_worker else -(-s * bs // n_total) for s in sizes]
    step_count = np.zeros(n_steps, np.int64)
    for s, b in zip(sizes, local_bs):
        starts = np.arange(n_steps) * b
        step_count += np.clip(s - starts, 0, b)
    my_bs = local_bs[rank]

    calibrated = method == "calibrated" and debias.calibration_weight > 0
    profiles = ProfileSampler(scale.min, scale.max, debias, len(items), calibrated)
    t, s_ = profiles.t, profiles.sharpness
    if profiles.note:
        notes.append(profiles.note)
    my_active = torch.from_numpy(np.unique(tr_u[mine & (np.arange(len(tr_u)) < len(organic))]))
    probe_target = (empirical_cdf(torch.from_numpy(all_pf_r).float(), t)
                    if calibrated and debias.probe_target_weight > 0 and len(all_pf_r) else None)

    def val_mae() -> float:
        with torch.no_grad():
            pred = model(pf_u, pf_i).double().clamp(scale.min, scale.max).numpy() if len(pf_r) else np.zeros(0)
        err, cnt = all_sum(float(np.abs(pred - pf_r).sum()), float(len(pf_r)))
        return err / cnt if cnt else float("nan")

    # RowAdam: torch.optim.SparseAdam's update (to float rounding), about 40% cheaper per step (tasks/engine/row_adam.py).
    optimiser = RowAdam(list(model.parameters()), lr=model_cfg.learning_rate)
    rounds: list[dict] = []
    draws: list[int] = []
    stopping = EarlyStopping(model, model_cfg.patience)

    for epoch in range(1, epochs + 1):
        t0 = time.perf_counter()
        status, n_refs, n_adjusted, n_with_error = "off", 0, 0, 0
        calib = None
        if calibrated:
            with torch.no_grad():
                pred = model(pf_u, pf_i).double().clamp(scale.min, scale.max).numpy()
            errs = probe_errors(pf_u.numpy(), pred, pf_r, debias.shrinkage)
            probs = reference_probabilities(errs, debias.reference_temperature, debias.reference_p_min,
                                            debias.reference_p_max)
            # Each worker keeps at most its share of the cap, so the gathered total stays near the cap.
            cap = -(-debias.max_reference_users // world) if debias.max_reference_users else 0
            my_refs = torch.from_numpy(cap_reference_users(draw_reference_users(probs, rng), cap, rng))
            draws.append(len(my_refs))
            is_ref = torch.zeros(len(users), dtype=torch.bool)
            is_ref[my_refs] = True
            adjusted = my_active[~is_ref[my_active]]
            ref_profiles = all_gather_rows(profiles.targets(model, my_refs, gen))      # every rank: all reference users
            n_refs = ref_profiles.shape[0]
            n_with_error, n_adjusted = (int(x) for x in all_sum(float(len(errs)), float(len(adjusted))))
            if n_refs == 0 and probe_target is None:
                status = "skipped: no reference users this round"
            elif n_adjusted == 0:
                status = "skipped: every active user is a reference user"
            else:
                status = "on"
        perm = torch.randperm(n_local, generator=gen)
        if status == "on":
            # As the single-process round: each rank visits its adjusted users spread over the round's steps;
            # the weight uses the global visit count, so the round's calibration part is the same objective.
            ups = -(-debias.users_per_step // world)
            visits = min(max(len(adjusted), n_steps), n_steps * ups) if len(adjusted) else 0
            reps = -(-visits // len(adjusted)) if len(adjusted) else 0
            visit_order = (torch.cat([adjusted[torch.randperm(len(adjusted), generator=gen)] for _ in range(reps)])[:visits]
                           if reps else torch.empty(0, dtype=torch.int64))
            global_visits = int(all_sum(float(visits))[0])
            calib = StepCalibration(t, s_, ref_profiles if n_refs else None, probe_target,
                                    debias.probe_target_weight, debias.calibration_weight, n_steps / global_visits)
        se_sum, term_sum = 0.0, 0.0
        S_u, S_i, S_r, S_w = T_u[perm], T_i[perm], T_r[perm], T_w[perm]    # one gather per round, as in fit()
        for step in range(n_steps):
            b = slice(step * my_bs, (step + 1) * my_bs)
            pick = visit_order[step * visits // n_steps:(step + 1) * visits // n_steps] if calib else None
            norm = float(step_count[step])
            loss, se, term = step_loss(model, S_u[b], S_i[b], S_r[b], S_w[b], norm, model_cfg.weight_decay,
                                       pick, profiles.step_items(gen) if pick is not None and len(pick) else None, calib)
            optimiser.zero_grad(set_to_none=True)
            loss.backward()
            if world > 1:          # one worker: its gradient is the sum already
                sum_gradients(model)
            optimiser.step()
            se_sum += float(se)
            term_sum += float(term) if term is not None else 0.0
        se_sum, term_sum = all_sum(se_sum, term_sum)
        if not all(bool(torch.isfinite(p).all()) for p in model.parameters()):
            raise FloatingPointError(f"training diverged at round {epoch} (non-finite weights); "
                                     "lower model.learning_rate or debias.calibration_weight")
        val = val_mae()
        rounds.append({"epoch": epoch, "reference_users": n_refs,
                       "reference_share": n_refs / n_with_error if n_with_error else float("nan"),
                       "adjusted_users": n_adjusted, "calibration": status, "loss": se_sum / n_steps,
                       "calibration_term": term_sum / global_visits if status == "on" else float("nan"),
                       "val_mae": val, "seconds": time.perf_counter() - t0})
        say(f"round {epoch}: loss={se_sum / n_steps:.4f} val_mae={val:.4f} calibration={status} references={n_refs}")
        if stopping.update(epoch, val):
            break
    best_epoch = stopping.restore()

    # Post-hoc maps from the whole fitting split, which every rank holds: identical on every rank.
    ckpt, errs = finish_checkpoint(model, users, items, scale, model_cfg, debias, previous, best_epoch, len(rounds),
                                   organic, probe_fit, all_pf_u, all_pf_i, all_pf_r, notes, info={"world_size": world})
    result = FitResult(checkpoint=ckpt, rounds=rounds, probe_errors=errs, probe_fit=probe_fit,
                       probe_heldout=probe_heldout, best_epoch=best_epoch, new_users=new_users,
                       new_items=new_items, notes=notes)
    digest = hashlib.sha256()
    for name, value in sorted(model.state_dict().items()):
        digest.update(name.encode() + value.detach().contiguous().numpy().tobytes())
    return result, ShardFacts(rank, world, n_local, len(my_active), len(pf_r), draws, digest.hexdigest())


# ---------------------------------------------------------------------------------------------
# torchrun entry
# ---------------------------------------------------------------------------------------------

def _load_window(args) -> pd.DataFrame:
    if args.ratings:
        return pd.read_parquet(args.ratings, columns=["user_id", "item_id", "rating", "source"])
    from tasks.config import load_config
    from tasks.ingest.store import read_window
    from tasks.workspace import Workspace
    cfg = load_config(args.config, workspace=args.workspace)
    return read_window(Workspace.at(cfg.paths.workspace), args.run_date, cfg.window.days)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="torchrun --nproc-per-node N -m tasks.engine.distributed",
                                 description="Data-parallel training of one night's candidate (gloo, CPU).")
    ap.add_argument("--config", help="TOML config (defaults when absent)")
    src = ap.add_mutually_exclusive_group(required=True)
    src.add_argument("--ratings", help="Parquet with user_id, item_id, rating, source (organic/probe)")
    src.add_argument("--run-date", help="train on the workspace store's window ending at this date")
    ap.add_argument("--workspace", help="workspace (overrides the config's paths.workspace)")
    ap.add_argument("--base", help="checkpoint folder to warm-start from (a version's model/ folder)")
    ap.add_argument("--out", required=True, help="folder for model/ and metrics.json (written by rank 0)")
    ap.add_argument("--batch-per-worker", action="store_true", help="each worker takes model.batch_size ratings "
                    "per step (W times fewer steps; larger batches than single-process training)")
    args = ap.parse_args(argv)

    from tasks.config import load_config
    from tasks.schemas import ORGANIC, PROBE
    cfg = load_config(args.config, workspace=args.workspace)
    dist.init_process_group("gloo")          # env:// from torchrun (RANK, WORLD_SIZE, MASTER_ADDR/PORT)
    try:
        window = _load_window(args)
        cols = ["user_id", "item_id", "rating"]
        organic = window.loc[window["source"] == ORGANIC, cols].reset_index(drop=True)
        probe = window.loc[window["source"] == PROBE, cols].reset_index(drop=True)
        base = Checkpoint.load(Path(args.base)) if args.base else None
        t0 = time.perf_counter()
        result, facts = fit_distributed(organic, probe, cfg.scale, cfg.model, cfg.debias, previous=base,
                                        log=print if int(os.environ.get("RANK", "0")) == 0 else None,
                                        batch_per_worker=args.batch_per_worker)
        seconds = time.perf_counter() - t0
        shards = [None] * facts.world
        dist.all_gather_object(shards, facts.__dict__)
        if facts.rank == 0:
            out = Path(args.out)
            out.mkdir(parents=True, exist_ok=True)
            result.checkpoint.save(out / "model")
            held = result.probe_heldout
            pred, _ = result.checkpoint.score(held["user_id"], held["item_id"])
            metrics = {"world_size": facts.world, "seconds": seconds, "heldout_n": len(held),
                       "heldout_mae": float(np.mean(np.abs(pred - held["rating"].to_numpy()))) if len(held) else None,
                       "best_epoch": result.best_epoch, "rounds": result.rounds, "shards": shards,
                       "notes": result.notes}
            (out / "metrics.json").write_text(json.dumps(metrics, indent=1, default=float))
        # Leave together: a worker tearing down its gloo group while rank 0 still writes was seen to abort
        # ("terminate called without an active exception", about 1 run in 6 under load).
        dist.barrier()
    finally:
        dist.destroy_process_group()
    return 0


if __name__ == "__main__":
    code = main()
    # Skip interpreter teardown: with gloo, destroying the process's C++ state at exit aborted a worker
    # now and then ("terminate called without an active exception", SIGABRT after all work was done and
    # written; about 1 run in 20 with two workers on two busy cores). Everything is flushed and closed.
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)
