"""What data-parallel training costs and buys on this machine: 1 process vs 2 workers under torchrun.

Not a test. Takes the 30-day window of the nightly benchmark's invented logs (``bench/make_logs.py``; latest
rating per user, item and source, as the store keeps it), writes it as one Parquet file, then trains the
same config three ways, each in fresh processes, and reads seconds per round and held-out probe MAE:

* ``single``: ``tasks.engine.trainer.fit`` in one process (via ``torchrun --nproc-per-node 1``, i.e. the
  data-parallel trainer with one worker, which reproduces ``fit`` exactly; tests/engine/test_distributed.py);
* ``2 workers``: ``torchrun --nproc-per-node 2``, the same objective (global batch = ``model.batch_size``);
* ``2 workers, batch per worker``: each worker takes ``model.batch_size`` ratings per step (half the steps).

    python bench/ddp_train.py --size 1M --epochs 3

Writes ``bench/out/ddp.md``. One torch thread per process; this machine has 2 cores, so 2 workers is the
most it can show.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "bench" / "out"


def window_parquet(logs: Path, dest: Path) -> int:
    import pyarrow as pa
    import pyarrow.parquet as pq
    parts = sorted(logs.glob("dt=*/*.parquet"))
    t = pa.concat_tables([pq.read_table(p, columns=["user_id", "item_id", "rating", "event_time", "source"])
                          for p in parts])
    df = t.to_pandas().sort_values("event_time", kind="stable")
    df = df.drop_duplicates(["user_id", "item_id", "source"], keep="last")
    df[["user_id", "item_id", "rating", "source"]].to_parquet(dest)
    return int((df["source"] == "organic").sum())


def run(ratings: Path, cfg: Path, workers: int, per_worker: bool, out: Path) -> dict:
    cmd = [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc-per-node", str(workers),
           "-m", "tasks.train.torchrun", "--ratings", str(ratings), "--config", str(cfg), "--out", str(out)]
    if per_worker:
        cmd.append("--batch-per-worker")
    env = {**os.environ, "OMP_NUM_THREADS": "1", "PYTHONPATH": str(ROOT)}
    t0 = time.perf_counter()
    done = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(done.stderr[-4000:])
    m = json.loads((out / "metrics.json").read_text())
    secs = [r["seconds"] for r in m["rounds"]]
    return {"workers": workers, "per_worker": per_worker, "wall_s": time.perf_counter() - t0,
            "fit_s": m["seconds"], "sec_per_round": sum(secs) / len(secs), "rounds": len(secs),
            "heldout_mae": m["heldout_mae"], "heldout_n": m["heldout_n"],
            "ratings_per_worker": [s["ratings"] for s in m["shards"]]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", default="1M")
    ap.add_argument("--logs", default="/tmp/tarewise-bench-logs")
    ap.add_argument("--epochs", type=int, default=3)
    ap.add_argument("--method", default="calibrated")
    args = ap.parse_args()
    sys.path.insert(0, str(ROOT / "bench"))
    from make_logs import make_logs
    folder, _ = make_logs(Path(args.logs), args.size)
    rows = []
    with tempfile.TemporaryDirectory(prefix="tarewise-ddp-") as tmp:
        tmp = Path(tmp)
        n = window_parquet(folder, tmp / "window.parquet")
        (tmp / "cfg.toml").write_text(f"[model]\nmax_epochs = {args.epochs}\npatience = {args.epochs + 1}\n"
                                      f"[debias]\nmethod = \"{args.method}\"\n")
        load = os.getloadavg()[0]
        for k, (workers, per_worker) in enumerate([(1, False), (2, False), (2, True)]):
            r = run(tmp / "window.parquet", tmp / "cfg.toml", workers, per_worker, tmp / f"out{k}")
            rows.append(r)
            print(r, file=sys.stderr, flush=True)
    base = rows[0]["sec_per_round"]
    lines = [f"# Data-parallel training ({args.size} window: {n:,} organic ratings, method {args.method}, "
             f"{args.epochs} rounds, 1 torch thread per worker, {os.cpu_count()} cores, load {load:.1f} at start)",
             "", "| run | s per round | speed-up | held-out probe MAE | ratings per worker |",
             "|---|---:|---:|---:|---|"]
    names = ["1 process", "2 workers, same objective", "2 workers, batch per worker"]
    for name, r in zip(names, rows):
        lines.append(f"| {name} | {r['sec_per_round']:.1f} | {base / r['sec_per_round']:.2f}x | "
                     f"{r['heldout_mae']:.4f} | {', '.join(f'{x:,}' for x in r['ratings_per_worker'])} |")
    text = "\n".join(lines) + "\n"
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / "ddp.md").write_text(text)
    print(text)


if __name__ == "__main__":
    main()
