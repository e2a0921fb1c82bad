"""What data-parallel training costs and buys on this machine: 1 process vs 2 and 4 workers under torchrun.

Not a test. Takes the 30-day window of the nightly benchmark's invented logs (``bench/make_logs.py``; latest
rating per user, item and source, as the store keeps it), writes it as one Parquet file, then trains the
same config several ways (``--runs``), each in fresh processes, and reads seconds per round, held-out
probe MAE and what each rank's collectives moved (``tasks/engine/distributed.py``'s meter: calls, bytes
received, seconds inside them):

* ``1``: ``tasks.engine.trainer.fit`` in one process (via ``torchrun --nproc-per-node 1``, i.e. the
  data-parallel trainer with one worker, which reproduces ``fit`` exactly; tests/engine/test_distributed.py);
* ``2`` / ``4``: 2 or 4 workers, the same objective (global batch = ``model.batch_size``);
* ``2p`` / ``4p``: each worker takes ``model.batch_size`` ratings per step (2 or 4 times fewer steps).

    python bench/ddp_train.py --size 300k --epochs 2 --runs 1,2,2p,4,4p --tag=-300k
    python bench/ddp_train.py --fit --hold-out 1M      # one cost model over the saved runs

Writes ``bench/out/ddp<tag>.md`` and ``.json``. One torch thread per process; this machine has 2 cores,
so 4 workers oversubscribe it (said in the tables).
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
    rounds = len(secs)
    steps = m["shards"][0]["steps_per_round"]
    ex = [s["exchange"] for s in m["shards"]]
    # Per rank and step: bytes received, collective calls, seconds inside collectives (the slowest rank's
    # figures are what a step waits for; bytes are near equal across ranks).
    return {"workers": workers, "per_worker": per_worker, "wall_s": time.perf_counter() - t0,
            "fit_s": m["seconds"], "sec_per_round": sum(secs) / len(secs), "rounds": rounds,
            "steps_per_round": steps, "steps_per_s": steps * rounds / sum(secs),
            "bytes_per_step": max(e["bytes_in"] for e in ex) / (steps * rounds),
            "calls_per_step": max(e["calls"] for e in ex) / (steps * rounds),
            "exchange_s_per_round": max(e["seconds"] for e in ex) / rounds,
            "heldout_mae": m["heldout_mae"], "heldout_n": m["heldout_n"],
            "ratings_per_worker": [s["ratings"] for s in m["shards"]]}


def fit_cost_model(rows: list[dict], n_ratings: int, cores: int) -> dict:
    """``round = n_steps x (c x ratings per worker per step x oversubscription + a x calls + bytes / bw)``.

    c (seconds per rating of compute, everything a round does per rating, the calibration term included)
    from the one-process run; ``a`` (seconds per collective call) and ``bw`` (bytes per second) by least
    squares on the multi-worker runs' measured exchange seconds against their calls and bytes.
    Oversubscription: W processes on ``cores`` cores run W / cores times slower when W > cores.
    """
    import numpy as np
    one = next(r for r in rows if r["workers"] == 1)
    c = (one["sec_per_round"] - one["exchange_s_per_round"]) / n_ratings
    multi = [r for r in rows if r["workers"] > 1]
    if multi:
        A = np.array([[r["calls_per_step"] * r["steps_per_round"], r["bytes_per_step"] * r["steps_per_round"]]
                      for r in multi])
        y = np.array([r["exchange_s_per_round"] for r in multi])
        coef, *_ = np.linalg.lstsq(A, y, rcond=None)
        a, inv_bw = max(float(coef[0]), 0.0), max(float(coef[1]), 1e-15)
    else:
        a, inv_bw = 0.0, 1e-15
    model = {"c_s_per_rating": c, "a_s_per_call": a, "bandwidth_bytes_per_s": 1.0 / inv_bw, "cores": cores}
    for r in rows:
        r["modelled_s_per_round"] = predict_round(model, n_ratings / r["workers"], r["workers"],
                                                  r["steps_per_round"], r["calls_per_step"], r["bytes_per_step"])
    return model


def predict_round(model: dict, ratings_per_worker: float, workers: int, steps: float, calls_per_step: float,
                  bytes_per_step: float) -> float:
    over = max(1.0, workers / model["cores"])
    return (model["c_s_per_rating"] * ratings_per_worker * over
            + (steps * (model["a_s_per_call"] * calls_per_step + bytes_per_step / model["bandwidth_bytes_per_s"])
               if workers > 1 else 0.0))


def fit_all(paths: list[Path], cores: int, hold_out: str = "") -> str:
    """One cost model over every saved run (``bench/out/ddp-*.json``): per round,
    ``c_r x ratings per worker x oversubscription + steps x (c_s + exchange per step)``, with
    ``exchange per step = a + bytes received / bw``. ``c_r`` (per rating) and ``c_s`` (per step) by least
    squares on the one-process runs, ``a`` and ``bw`` on the multi-worker runs' measured exchange seconds;
    then every run's round is predicted and set beside the measurement. Runs of window ``hold_out`` are
    left out of the fit: they validate it."""
    import numpy as np
    runs = []
    for p in paths:
        d = json.loads(p.read_text())
        for r in d["rows"]:
            runs.append({**r, "n": d["n_ratings"], "size": d["size"], "batch": d["batch"] or 1024})
    fitted = [r for r in runs if r["size"] != hold_out]
    one = [r for r in fitted if r["workers"] == 1]
    A = np.array([[r["n"], r["steps_per_round"]] for r in one], float)
    y = np.array([r["sec_per_round"] for r in one])
    (c_r, c_s), *_ = np.linalg.lstsq(A, y, rcond=None) if len(one) > 1 else ((y[0] / one[0]["n"], 0.0),)
    multi = [r for r in fitted if r["workers"] > 1]
    A = np.array([[r["steps_per_round"], r["steps_per_round"] * r["bytes_per_step"]] for r in multi], float)
    y = np.array([r["exchange_s_per_round"] for r in multi])
    (a, inv_bw), *_ = np.linalg.lstsq(A, y, rcond=None)
    a, inv_bw = max(float(a), 0.0), max(float(inv_bw), 1e-15)
    lines = [f"Joint cost model over {len(runs)} runs: compute {c_r * 1e6:.2f} us per rating + {c_s * 1e3:.2f} ms per "
             f"step; exchange {a * 1e3:.2f} ms per step + bytes at {1 / inv_bw / 1e6:.1f} MB/s.", "",
             "| window | batch | run | in the fit | s per round measured | modelled | error |",
             "|---|---:|---|---|---:|---:|---:|"]
    for r in runs:
        w, steps = r["workers"], r["steps_per_round"]
        over = max(1.0, w / cores)
        m = c_r * r["n"] / w * over + steps * c_s * over + (steps * (a + r["bytes_per_step"] * inv_bw) if w > 1 else 0)
        lines.append(f"| {r['size']} | {r['batch']} | {NAMES[r['name']]} | {'no' if r['size'] == hold_out else 'yes'} "
                     f"| {r['sec_per_round']:.1f} | {m:.1f} "
                     f"| {m / r['sec_per_round'] - 1:+.0%} |")
    return "\n".join(lines) + "\n"


RUNS = {"1": (1, False), "2": (2, False), "2p": (2, True), "4": (4, False), "4p": (4, True)}
NAMES = {"1": "1 process", "2": "2 workers, same objective", "2p": "2 workers, batch per worker",
         "4": "4 workers, same objective (oversubscribed)", "4p": "4 workers, batch per worker (oversubscribed)"}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", default="1M")
    ap.add_argument("--logs", default="/tmp/tarewise-bench-logs")
    ap.add_argument("--epochs", type=int, default=3)
    ap.add_argument("--method", default="calibrated")
    ap.add_argument("--batch", type=int, default=0, help="model.batch_size (0: the config's)")
    ap.add_argument("--runs", default="1,2,2p", help="comma list of " + ",".join(RUNS))
    ap.add_argument("--tag", default="", help="suffix of bench/out/ddp<tag>.json/.md")
    ap.add_argument("--fit", action="store_true", help="only fit one cost model over bench/out/ddp-*.json")
    ap.add_argument("--hold-out", default="", help="with --fit: window size whose runs validate the fit")
    args = ap.parse_args()
    if args.fit:
        text = fit_all(sorted(OUT.glob("ddp-*.json")), os.cpu_count() or 1, args.hold_out)
        (OUT / "ddp-model.md").write_text(text)
        print(text)
        return
    sys.path.insert(0, str(ROOT / "bench"))
    from make_logs import make_logs
    folder, _ = make_logs(Path(args.logs), args.size)
    rows = []
    with tempfile.TemporaryDirectory(prefix="tarewise-ddp-") as tmp:
        tmp = Path(tmp)
        n = window_parquet(folder, tmp / "window.parquet")
        batch = f"batch_size = {args.batch}\n" if args.batch else ""
        (tmp / "cfg.toml").write_text(f"[model]\nmax_epochs = {args.epochs}\npatience = {args.epochs + 1}\n{batch}"
                                      f"[debias]\nmethod = \"{args.method}\"\n")
        load = os.getloadavg()[0]
        for k, name in enumerate(args.runs.split(",")):
            workers, per_worker = RUNS[name]
            r = run(tmp / "window.parquet", tmp / "cfg.toml", workers, per_worker, tmp / f"out{k}")
            r["name"] = name
            r["load"] = os.getloadavg()[0]
            rows.append(r)
            print(r, file=sys.stderr, flush=True)
    cores = os.cpu_count() or 1
    model = fit_cost_model(rows, n, cores)
    base = rows[0]["sec_per_round"]
    lines = [f"# Data-parallel training ({args.size} window: {n:,} organic ratings, method {args.method}, "
             f"batch {args.batch or 'default'}, {args.epochs} rounds, 1 torch thread per worker, {cores} cores, "
             f"load {load:.1f} at start)",
             "", "| run | s per round (measured) | modelled | speed-up | steps/s | bytes in per step | collectives "
             "per step | exchange s per round | held-out probe MAE | ratings per worker |",
             "|---|" + "---:|" * 8 + "---|"]
    for r in rows:
        lines.append(f"| {NAMES[r['name']]} | {r['sec_per_round']:.1f} | {r['modelled_s_per_round']:.1f} "
                     f"| {base / r['sec_per_round']:.2f}x | {r['steps_per_s']:.0f} | {r['bytes_per_step']:,.0f} "
                     f"| {r['calls_per_step']:.1f} | {r['exchange_s_per_round']:.1f} | {r['heldout_mae']:.4f} "
                     f"| {', '.join(f'{x:,}' for x in r['ratings_per_worker'])} |")
    lines += ["", f"Cost model (fitted on these runs): compute {model['c_s_per_rating'] * 1e6:.2f} us per rating "
              f"(one process), {model['a_s_per_call'] * 1e6:.0f} us per collective call, "
              f"{model['bandwidth_bytes_per_s'] / 1e6:,.0f} MB/s effective bandwidth (local gloo)."]
    text = "\n".join(lines) + "\n"
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / f"ddp{args.tag}.md").write_text(text)
    (OUT / f"ddp{args.tag}.json").write_text(json.dumps({"rows": rows, "model": model, "n_ratings": n,
                                                         "size": args.size, "batch": args.batch,
                                                         "epochs": args.epochs}, indent=1))
    print(text)


if __name__ == "__main__":
    main()
