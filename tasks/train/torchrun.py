"""Data-parallel training of one night's candidate under ``torchrun`` (gloo on CPU): the command line.

    torchrun --nproc-per-node 2 -m tasks.train.torchrun --ratings window.parquet --out run/
    torchrun --nnodes 4 --nproc-per-node 8 --rdzv-backend c10d --rdzv-endpoint host:29400 \\
        -m tasks.train.torchrun --config tarewise.toml --run-date 2026-11-30 --out run/

Every worker reads the config and the window (a Parquet file, or the workspace store's window ending at
``--run-date``), converts the config to the engine's settings and trains with
:func:`tasks.engine.distributed.fit_distributed`; rank 0 writes ``model/`` (a checkpoint) and
``metrics.json`` (held-out probe MAE, rounds, every worker's shard facts) under ``--out``.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import torch.distributed as dist

from tasks.config import load_config
from tasks.engine.checkpoint import Checkpoint
from tasks.engine.distributed import METER, fit_distributed
from tasks.ingest.store import read_window
from tasks.train.settings import engine_settings
from tasks.train.training import split_sources
from tasks.workspace import Workspace


def _load_window(args) -> pd.DataFrame:
    if args.ratings:
        return pd.read_parquet(args.ratings, columns=["user_id", "item_id", "rating", "source"])
    cfg = load_config(args.config, workspace=args.workspace)
    return read_window(Workspace.at(cfg.paths.workspace), args.run_date, cfg.window.days)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="torchrun --nproc-per-node N -m tasks.train.torchrun",
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

    cfg = load_config(args.config, workspace=args.workspace)
    dist.init_process_group("gloo")          # env:// from torchrun (RANK, WORLD_SIZE, MASTER_ADDR/PORT)
    try:
        organic, probe = split_sources(_load_window(args))
        base = Checkpoint.load(Path(args.base)) if args.base else None
        t0 = time.perf_counter()
        result, facts = fit_distributed(organic, probe, engine_settings(cfg), previous=base,
                                        log=print if int(os.environ.get("RANK", "0")) == 0 else None,
                                        batch_per_worker=args.batch_per_worker)
        seconds = time.perf_counter() - t0
        shards = [None] * facts.world
        dist.all_gather_object(shards, {**facts.__dict__, "exchange": METER.__dict__.copy()})
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
