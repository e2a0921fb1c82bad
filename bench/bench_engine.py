"""Engine benchmark: seconds per epoch of plain vs calibrated training, throughput and peak memory.

Not a timed test. Generates synthetic selection-skewed logs (invented numbers, vectorised generation:
never a users x items array) at the sizes asked for and trains each case in its own subprocess so that
peak memory (``ru_maxrss``) belongs to that case alone. Prints a markdown table and writes it to
``bench/out/engine.md``.

    python bench/bench_engine.py                    # 100k, 1M and 5M ratings
    python bench/bench_engine.py --sizes 100k,1M    # a subset
    python bench/bench_engine.py --epochs 3         # average over more epochs
    nice -n 10 python bench/bench_engine.py --one-process --sizes 1M,10M --repeats 5 --packed
    nice -n 10 python bench/bench_engine.py --one-process --sizes 1M,10M --repeats 5 --free-term
    nice -n 10 python bench/bench_engine.py --to-convergence 2 --sizes 100k,1M

Goals (from the engine issue): calibrated epoch <= 1.5x plain epoch at 1M ratings; peak memory bounded by
``debias.memory_budget_mb`` plus the data, not by users x items. Issue 17: a calibrated epoch <= 1.3x the
trainer's own plain epoch at 1M and 10M, measured in one process: ``--one-process`` trains a plain and a
calibrated model (and, with ``--packed``, a calibrated one with the packed term schedule) side by side on
the same frames, one round each in turn (A B A B ..., after one warm-up round each, so load on a shared
machine falls on both), and prints the median seconds per round and the median of the per-repeat ratios,
with the load average. It ends with each model's held-out probe MAE and calibration term (see
``heldout_facts``) after the same number of rounds, which is what a schedule that changes the term's path
has to keep.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "bench" / "out" / "engine.md"

#: name -> (ratings, users, items). Invented sizes spanning the issue's ranges.
SIZES = {
    "100k": (100_000, 10_000, 5_000),
    "1M": (1_000_000, 40_000, 20_000),
    "5M": (5_000_000, 100_000, 50_000),
    "10M": (10_000_000, 200_000, 50_000),
}
METHODS = ("plain", "calibrated")


def synthetic_logs(n_ratings: int, n_users: int, n_items: int, seed: int = 0,
                   probe_share: float = 0.03, probes_per_user: int = 5) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Organic (MNAR) and probe (MAR) ratings, 1-5 stars, ids like ``member-000123`` / ``title-004567``.

    Users' activity and items' popularity are long-tailed (Zipf-like weights); a drawn (user, item) pair is
    kept with a probability that depends on its true rating (members mostly rate what they loved or
    hated). Everything is drawn in vectors of length ~n_ratings; memory is O(n_ratings + users + items).
    """
    rng = np.random.default_rng(seed)
    dim = 8
    P = rng.normal(0, 0.5, (n_users, dim)).astype(np.float32)
    Q = rng.normal(0, 0.5, (n_items, dim)).astype(np.float32)
    bu = rng.normal(0, 0.4, n_users).astype(np.float32)
    bi = rng.normal(0, 0.5, n_items).astype(np.float32)
    user_w = 1.0 / np.arange(1, n_users + 1) ** 0.6
    item_w = 1.0 / np.arange(1, n_items + 1) ** 0.9
    user_w, item_w = rng.permutation(user_w / user_w.sum()), rng.permutation(item_w / item_w.sum())
    keep_by_star = np.array([0.5, 0.15, 0.08, 0.3, 0.9])   # invented selection: extremes get rated

    def true_rating(u: np.ndarray, i: np.ndarray) -> np.ndarray:
        score = 3.0 + bu[u] + bi[i] + np.einsum("nd,nd->n", P[u], Q[i])
        return np.clip(np.rint(score + rng.normal(0, 0.3, len(u))), 1, 5)

    pairs = np.empty(0, dtype=np.int64)
    stars = np.empty(0)
    while len(pairs) < n_ratings:
        m = int((n_ratings - len(pairs)) * 3.2) + 1000
        u = rng.choice(n_users, m, p=user_w)
        i = rng.choice(n_items, m, p=item_w)
        r = true_rating(u, i)
        keep = rng.random(m) < keep_by_star[r.astype(int) - 1]
        pairs = np.concatenate([pairs, u[keep].astype(np.int64) * n_items + i[keep]])
        stars = np.concatenate([stars, r[keep]])
        pairs, first = np.unique(pairs, return_index=True)   # one rating per pair
        stars = stars[first]
    pick = np.sort(rng.choice(len(pairs), n_ratings, replace=False))
    pairs, stars = pairs[pick], stars[pick]
    user_ids = np.array([f"member-{k:06d}" for k in range(n_users)], dtype=object)
    item_ids = np.array([f"title-{k:06d}" for k in range(n_items)], dtype=object)
    organic = pd.DataFrame({"user_id": user_ids[pairs // n_items], "item_id": item_ids[pairs % n_items],
                            "rating": stars})
    pu = np.repeat(rng.choice(n_users, max(1, int(probe_share * n_users)), replace=False), probes_per_user)
    pi = rng.integers(0, n_items, len(pu))
    probe = pd.DataFrame({"user_id": user_ids[pu], "item_id": item_ids[pi], "rating": true_rating(pu, pi)})
    return organic, probe


def _rss_mb() -> float:
    """Peak resident set size of this process so far, MB (ru_maxrss: KiB on Linux, bytes on macOS)."""
    scale = 1 / 1024 if sys.platform != "darwin" else 1 / 2**20
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * scale


def _current_rss_mb() -> float:
    """Current resident set size, MB (Linux /proc; falls back to the peak elsewhere)."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return _rss_mb()


class _RssSampler:
    """Highest current RSS seen while training, sampled every 20 ms by a background thread.

    ru_maxrss alone cannot tell training's peak from the Parquet read's peak before it.
    """

    def __init__(self) -> None:
        self.peak = _current_rss_mb()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        while not self._stop.wait(0.02):
            self.peak = max(self.peak, _current_rss_mb())

    def __enter__(self) -> "_RssSampler":
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, _current_rss_mb())


def run_case(size: str, method: str, epochs: int, overrides: dict, data_dir: Path) -> dict:
    """Train one case in this process; return its measurements."""
    import torch

    from tasks.config import Config
    from tasks.engine.trainer import fit
    from tasks.train.settings import engine_settings

    torch.set_num_threads(1)
    # Read the logs the parent generated: generation's temporary arrays would otherwise set the peak.
    organic = pd.read_parquet(data_dir / "organic.parquet")
    probe = pd.read_parquet(data_dir / "probe.parquet")
    gc.collect()
    rss_data = _current_rss_mb()
    nu = pd.concat([organic["user_id"], probe["user_id"]]).nunique()     # members actually present
    ni = pd.concat([organic["item_id"], probe["item_id"]]).nunique()
    cfg = Config().updated({"debias.method": method, "model.max_epochs": epochs, "model.patience": epochs + 1,
                            **overrides})
    # CPU seconds of each round from the per-round log callback (the machine may be shared, so wall time
    # alone can mislead); round 1 is left out of the CPU figure because it also carries the setup.
    cpu_marks: list[float] = []
    t0 = time.perf_counter()
    cpu_start = time.process_time()
    with _RssSampler() as rss:
        res = fit(organic, probe, engine_settings(cfg), log=lambda _m: cpu_marks.append(time.process_time()))
    total = time.perf_counter() - t0
    secs = [r["seconds"] for r in res.rounds]
    cpu = np.diff(cpu_marks) if len(cpu_marks) > 1 else np.array([cpu_marks[0] - cpu_start])
    return {"size": size, "method": method, "ratings": len(organic), "users": nu, "items": ni,
            "probe": len(probe), "epochs": len(secs), "sec_per_epoch": float(np.mean(secs)),
            "cpu_per_epoch": float(np.mean(cpu)),
            "ratings_per_sec": len(organic) / float(np.mean(secs)), "fit_total_s": total,
            "rss_before_fit_mb": rss_data, "peak_rss_fit_mb": rss.peak, "peak_rss_mb": _rss_mb(),
            "calibration": res.rounds[-1]["calibration"], "budget_mb": cfg.debias.memory_budget_mb,
            "users_per_step": cfg.debias.users_per_step, "profile_item_sample": cfg.debias.profile_item_sample}


def _subprocess_case(size: str, method: str, epochs: int, overrides: dict, data_dir: Path) -> dict:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--case", f"{size}:{method}", "--epochs", str(epochs),
           "--overrides", json.dumps(overrides), "--data", str(data_dir)]
    env = {**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1"}
    done = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=ROOT)
    if done.returncode != 0:
        raise RuntimeError(f"case {size}:{method} failed:\n{done.stderr[-4000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def table(rows: list[dict]) -> str:
    by = {(r["size"], r["method"]): r for r in rows}
    lines = ["| size | ratings | users | items | method | s/epoch (wall) | ratio (wall) | CPU s/epoch "
             "| ratio (CPU) | ratings/s (wall) | RSS at fit start (MB) | peak RSS in fit (MB) | growth (MB) "
             "| process peak (MB) | users x items float32 (MB) |",
             "|---|---:|---:|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for r in rows:
        plain = by.get((r["size"], "plain"))
        ratio = f"{r['sec_per_epoch'] / plain['sec_per_epoch']:.2f}x" if plain else "-"
        cpu_ratio = f"{r['cpu_per_epoch'] / plain['cpu_per_epoch']:.2f}x" if plain else "-"
        dense = r["users"] * r["items"] * 4 / 2**20
        lines.append(f"| {r['size']} | {r['ratings']:,} | {r['users']:,} | {r['items']:,} | {r['method']} "
                     f"| {r['sec_per_epoch']:.2f} | {ratio} | {r['cpu_per_epoch']:.2f} | {cpu_ratio} "
                     f"| {r['ratings_per_sec']:,.0f} "
                     f"| {r['rss_before_fit_mb']:.0f} | {r['peak_rss_fit_mb']:.0f} "
                     f"| {r['peak_rss_fit_mb'] - r['rss_before_fit_mb']:.0f} | {r['peak_rss_mb']:.0f} | {dense:,.0f} |")
    return "\n".join(lines)


def heldout_facts(training, eval_users: int = 5000, seed: int = 12345) -> dict:
    """Held-out probe MAE (raw factoriser, clipped to the scale) and the calibration term of ``training``'s
    current weights: ``eval_users`` adjusted users drawn with a fixed seed, their profiles over
    ``profile_item_sample`` fixed-seed items each, against a reference draw made with a fixed seed (the
    method's own draw: probe errors under these weights), mean over users. The same seeds for every model,
    so two schedules are compared on the same draws wherever their probe errors agree."""
    import torch

    from tasks.engine.calibration import calibration_term

    scale = training.settings.scale
    held = training.probe_heldout
    u, i = training.users.lookup(held["user_id"]), training.items.lookup(held["item_id"])
    with torch.no_grad():
        pred = training.model(torch.from_numpy(u), torch.from_numpy(i)).double().clamp(scale.min, scale.max)
    mae = float(np.abs(pred.numpy() - held["rating"].to_numpy(float)).mean())
    saved = training.rng, training.gen, list(training.reference_draws)
    training.rng, training.gen = np.random.default_rng(seed), torch.Generator().manual_seed(seed)
    try:
        adjusted, references, _facts = training._references()
        pick = adjusted[torch.randperm(len(adjusted), generator=training.gen)[:eval_users]]
        profiles = training.profiles.targets(training.model, pick, training.gen)
        term = float(calibration_term(profiles, references)) if len(references) else float("nan")
    finally:
        training.rng, training.gen, training.reference_draws = saved
    return {"heldout_mae": mae, "term": term, "heldout_n": len(held)}


def _no_term_arithmetic(pred, *_args, **_kwargs):
    """Stands in for the term in the ``--free-term`` case: zero, with a zero gradient into the block."""
    return (pred * 0.0).sum(1)


def one_process(size: str, repeats: int, overrides: dict, packed: bool, free_term: bool = False) -> dict:
    """Plain and calibrated rounds in turn in this process on the same frames; returns medians, ratios, load.
    ``free_term``: also a calibrated model whose term costs nothing (:func:`_no_term_arithmetic`): it
    still reads the block of predictions and updates its members' and titles' rows, so its ratio is the
    floor for any exact speed-up of the term itself."""
    import torch

    from tasks.config import Config
    from tasks.engine import trainer
    from tasks.engine.trainer import Training
    from tasks.train.settings import engine_settings

    torch.set_num_threads(1)
    t0 = time.perf_counter()
    organic, probe = synthetic_logs(*SIZES[size])
    print(f"{size}: generated in {time.perf_counter() - t0:.1f} s", file=sys.stderr, flush=True)
    cases = {"plain": ("plain", "spread"), "calibrated": ("calibrated", "spread")}
    if packed:
        cases["calibrated packed"] = ("calibrated", "packed")
    if free_term:
        cases["calibrated, term free (a floor)"] = ("calibrated", "spread")
    trainings = {}
    for name, (method, schedule) in cases.items():
        cfg = Config().updated({"debias.method": method, "model.max_epochs": repeats + 1,
                                "model.patience": repeats + 2, **overrides})
        trainings[name] = Training(organic, probe, engine_settings(cfg))
        trainings[name].term_schedule = schedule
    real_term = trainer.profile_term_per_user

    def round_of(name: str, epoch: int) -> None:
        trainer.profile_term_per_user = _no_term_arithmetic if name.endswith("(a floor)") else real_term
        try:
            trainings[name].run_round(epoch)
        finally:
            trainer.profile_term_per_user = real_term

    load_start = os.getloadavg()
    for name in trainings:                 # warm-up: first touches of every table, allocator growth
        round_of(name, 1)
    wall = {name: [] for name in trainings}
    cpu = {name: [] for name in trainings}
    for rep in range(repeats):
        for name in trainings:
            w0, c0 = time.perf_counter(), time.process_time()
            round_of(name, rep + 2)
            wall[name].append(time.perf_counter() - w0)
            cpu[name].append(time.process_time() - c0)
        print(f"{size} repeat {rep + 1}: " + ", ".join(f"{n} {wall[n][-1]:.2f} s" for n in trainings)
              + f" (load {os.getloadavg()[0]:.1f})", file=sys.stderr, flush=True)
    load_end = os.getloadavg()
    out = {"size": size, "ratings": len(organic), "repeats": repeats, "load_start": load_start[0],
           "load_end": load_end[0], "cases": {}}
    for name, tr in trainings.items():
        w, c = np.array(wall[name]), np.array(cpu[name])
        out["cases"][name] = {
            "wall": float(np.median(w)), "cpu": float(np.median(c)),
            "ratio_wall": float(np.median(w / np.array(wall["plain"]))),
            "ratio_cpu": float(np.median(c / np.array(cpu["plain"]))),
            "train_term": float(np.mean([r["calibration_term"] for r in tr.rounds[-3:]])),
            **heldout_facts(tr)}
    return out


def to_convergence(size: str, overrides: dict, seed: int) -> dict:
    """Calibrated training to early stopping under each term schedule (and plain for scale), same data
    and seed; returns per case the rounds run, the best round, seconds per round and :func:`heldout_facts`
    of the kept weights. What a schedule must not lose is here, not in a few timed rounds."""
    import torch

    from tasks.config import Config
    from tasks.engine.trainer import Training
    from tasks.train.settings import engine_settings

    torch.set_num_threads(1)
    organic, probe = synthetic_logs(*SIZES[size], seed=seed)
    out = {"size": size, "seed": seed, "cases": {}}
    for name, method, schedule in (("plain", "plain", "spread"), ("calibrated", "calibrated", "spread"),
                                   ("calibrated packed", "calibrated", "packed")):
        cfg = Config().updated({"debias.method": method, "model.seed": seed + 7, **overrides})
        tr = Training(organic, probe, engine_settings(cfg))
        tr.term_schedule = schedule
        res = tr.run()
        out["cases"][name] = {"rounds": len(res.rounds), "best": res.best_epoch,
                              "sec_per_round": float(np.median([r["seconds"] for r in res.rounds])),
                              **heldout_facts(tr)}
        print(f"{size} seed {seed} {name}: {out['cases'][name]}", file=sys.stderr, flush=True)
    return out


def convergence_table(results: list[dict]) -> str:
    lines = ["| size | seed | case | rounds (best) | s/round (median) | held-out probe MAE | calibration term "
             "(held-out draw) |", "|---|---:|---|---:|---:|---:|---:|"]
    for r in results:
        for name, c in r["cases"].items():
            lines.append(f"| {r['size']} | {r['seed']} | {name} | {c['rounds']} ({c['best']}) "
                         f"| {c['sec_per_round']:.2f} | {c['heldout_mae']:.4f} | {c['term']:.4f} |")
    return "\n".join(lines)


def one_process_table(results: list[dict]) -> str:
    lines = ["| size | case | s/round (wall, median) | **ratio to plain (wall)** | CPU s/round | ratio (CPU) "
             "| held-out probe MAE | calibration term (held-out draw) | training term (last 3 rounds) "
             "| rounds timed | load start / end |",
             "|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for r in results:
        for name, c in r["cases"].items():
            lines.append(f"| {r['size']} | {name} | {c['wall']:.2f} | **{c['ratio_wall']:.2f}x** | {c['cpu']:.2f} "
                         f"| {c['ratio_cpu']:.2f}x | {c['heldout_mae']:.4f} | {c['term']:.4f} "
                         f"| {c['train_term']:.4f} | {r['repeats']} | {r['load_start']:.1f} / {r['load_end']:.1f} |")
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="100k,1M,5M", help="comma list of " + ",".join(SIZES))
    ap.add_argument("--epochs", type=int, default=3, help="epochs per case (time is averaged over them)")
    ap.add_argument("--overrides", default="{}", help='JSON of dotted config overrides, e.g. '
                    '\'{"debias.users_per_step": 128}\'')
    ap.add_argument("--out", default=str(OUT))
    ap.add_argument("--one-process", action="store_true", help="plain and calibrated rounds in turn in one "
                    "process (issue 17's ratio); prints medians and held-out facts")
    ap.add_argument("--repeats", type=int, default=5, help="--one-process: timed rounds per case")
    ap.add_argument("--to-convergence", type=int, default=0, metavar="SEEDS", help="train plain, calibrated and "
                    "calibrated packed to early stopping on SEEDS seeds and print held-out facts (no timing ratio)")
    ap.add_argument("--packed", action="store_true", help="--one-process: also a calibrated model with the "
                    "packed term schedule (Training.term_schedule)")
    ap.add_argument("--free-term", action="store_true", help="--one-process: also a calibrated model whose term "
                    "costs nothing (the floor for exact speed-ups of the term)")
    ap.add_argument("--case", help=argparse.SUPPRESS)   # internal: run one case, print JSON
    ap.add_argument("--data", help=argparse.SUPPRESS)   # internal: folder with the case's Parquet logs
    args = ap.parse_args()
    overrides = json.loads(args.overrides)
    if args.case:
        size, method = args.case.split(":")
        print(json.dumps(run_case(size, method, args.epochs, overrides, Path(args.data))))
        return
    sizes = [s.strip() for s in args.sizes.split(",") if s.strip()]
    unknown = [s for s in sizes if s not in SIZES]
    if unknown:
        ap.error(f"unknown size(s) {unknown}; choose from {list(SIZES)}")
    if args.to_convergence:
        results = [to_convergence(size, overrides, seed) for size in sizes for seed in range(args.to_convergence)]
        text = ("# Engine benchmark: term schedules to early stopping\n\n" + convergence_table(results) + "\n")
        print(text)
        out = Path(args.out).with_name("engine-convergence.md")
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(text)
        return
    if args.one_process:
        results = [one_process(size, args.repeats, overrides, args.packed, args.free_term) for size in sizes]
        text = ("# Engine benchmark, one process\n\nSynthetic selection-skewed logs (invented numbers); plain and "
                f"calibrated rounds in turn in one process, 1 torch thread, {args.repeats} timed rounds per case "
                f"after one warm-up round each, {platform.processor() or platform.machine()}, {os.cpu_count()} cores"
                f"{'; overrides ' + json.dumps(overrides) if overrides else ''}. Ratio = median over repeats of "
                "(case round / the plain round next to it).\n\n" + one_process_table(results) + "\n")
        print(text)
        print(json.dumps(results), file=sys.stderr)
        out = Path(args.out).with_name("engine-one-process.md")
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(text)
        return
    rows = []
    for size in sizes:
        with tempfile.TemporaryDirectory(prefix=f"tarewise-bench-{size}-") as tmp:
            t0 = time.perf_counter()
            organic, probe = synthetic_logs(*SIZES[size])
            organic.to_parquet(Path(tmp) / "organic.parquet")
            probe.to_parquet(Path(tmp) / "probe.parquet")
            del organic, probe
            print(f"{size}: generated in {time.perf_counter() - t0:.1f} s", file=sys.stderr, flush=True)
            for method in METHODS:
                r = _subprocess_case(size, method, args.epochs, overrides, Path(tmp))
                rows.append(r)
                print(f"{size} {method}: {r['sec_per_epoch']:.2f} s/epoch (CPU {r['cpu_per_epoch']:.2f}), "
                      f"RSS {r['rss_before_fit_mb']:.0f} -> {r['peak_rss_fit_mb']:.0f} MB in fit", file=sys.stderr,
                      flush=True)
    first = rows[0]
    header = (f"# Engine benchmark\n\nSynthetic selection-skewed logs (invented numbers), {args.epochs} epoch(s) "
              f"per case, 1 torch thread, one subprocess per case, {platform.processor() or platform.machine()}, "
              f"{os.cpu_count()} cores. Defaults: batch 1024, dim 16, users_per_step {first['users_per_step']}, "
              f"profile_item_sample {first['profile_item_sample']}, memory_budget_mb {first['budget_mb']:.0f}"
              f"{'; overrides ' + json.dumps(overrides) if overrides else ''}.\n"
              "Logs are generated once per size and read from Parquet by each case. "
              "Ratio = calibrated / plain seconds per epoch (goal <= 1.5x at 1M); CPU columns leave out round 1 "
              "(it carries the setup) and are the fairer figure on a shared machine. RSS is the whole process "
              "(Python + torch + data): at fit start (current), highest while fitting (sampled every 20 ms), "
              "their difference, and the process peak (which may be the Parquet read). The last column is "
              "what one dense users x items float32 matrix would need.\n\n")
    text = header + table(rows) + "\n"
    print(text)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text)


if __name__ == "__main__":
    main()
