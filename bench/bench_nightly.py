"""Nightly benchmark: the real nightly flow on 1M, 10M and 30M invented ratings over a 30-day window.

Not a test. For each size, one subprocess (so ``ru_maxrss`` is that size's peak alone; Prefect's local
API server is a separate process and not counted) does, in Prefect's local mode:

1. **Store the window.** The first 28 days go through ingest's plain functions (read, validate,
   quarantine, store), exactly what the ingest tasks call, without 28 flow runs: backfilling 30 nights
   would train 30 times. Timed against a bare ``pyarrow.parquet.read_table`` of the same files.
2. **Seed night** (day 29): a cold start capped at ``--seed-epochs`` epochs, so that the measured night
   is a warm-started fine-tune as in production.
3. **Measured night** (day 30): the unmodified nightly flow: ingest one day, read the 30-day window,
   fine-tune candidate (``--method``, default ``calibrated``) and plain shadow, evaluate, top-N
   predictions for every active user, publish, drift report. Stage wall times come from the run ledger.
4. **References, same process, same data**: (a) a bare ``pyarrow.parquet.read_table`` of the night's
   partition and of the 28 stored days; (b) one bare plain-MF epoch (``nn.Embedding(sparse=True)`` +
   ``SparseAdam``, batch and dim as configured) on the window's organic ratings as tensors.

Results go to ``bench/out/nightly.json`` (merged by size, so sizes can be run at different times),
``bench/out/nightly.md`` (the tables) and ``bench/out/nightly.png`` (stage seconds and peak memory against
ratings, log-log, with a line of slope 1 for reference).

    python bench/bench_nightly.py --sizes 1M,10M
    python bench/bench_nightly.py --sizes 30M --logs /tmp/tarewise-bench-logs
    python bench/bench_nightly.py --sizes 1M --profile     # pyinstrument text profile of the measured night
    python bench/bench_nightly.py --render                 # re-render table and plot from nightly.json
    python bench/bench_nightly.py --sizes 1M,10M --shared  # + cost of the shared copy (paths.shared)

With ``--shared`` both nights also bring a shared copy (``paths.shared``, a ``file://`` folder on the same
disk) up to date: the seed night's copy is the first, whole one (the stored days, the seed version); the
measured night's copy is what every later night sends (one day, one version). Those rows are kept apart
from the main table.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))
OUT = ROOT / "bench" / "out"

STAGES = ("ingest", "window", "train", "evaluate", "anchor", "predict", "publish", "report")


def _rss_mb() -> float:
    # ru_maxrss is in KiB on Linux (bytes on macOS).
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / (1024 if sys.platform != "darwin" else 2**20)


def _rss_now_mb() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


class StageMemory:
    """Peak RSS per stage of the nights run while it is on: a thread samples ``/proc/self/statm`` every
    20 ms and files each sample under the stage the run is in (the ledger's ``RunRecord.stage`` is
    wrapped to say which). A sample is a lower bound of the true peak (a spike shorter than 20 ms can be
    missed); the process's ``ru_maxrss`` is the exact whole-run peak."""

    def __init__(self, progress=None) -> None:
        import threading
        from contextlib import contextmanager

        from tasks.ledger import RunRecord
        self.current, self.peaks, self._stop = "outside", {}, threading.Event()
        self.progress = progress       # called every 10 s with the stage and peaks so far (a run cut short)
        original = RunRecord.stage
        memory = self

        @contextmanager
        def stage(record, name):
            before, memory.current = memory.current, name
            try:
                with original(record, name):
                    yield
            finally:
                memory.current = before
        RunRecord.stage = stage
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _run(self) -> None:
        last = time.perf_counter()
        while not self._stop.wait(0.02):
            rss = _rss_now_mb()
            self.peaks[self.current] = max(self.peaks.get(self.current, 0.0), rss)
            if self.progress is not None and time.perf_counter() - last > 10:
                last = time.perf_counter()
                self.progress({"stage": self.current, "stage_peak_rss_mb": dict(self.peaks), "rss_mb": rss})

    def stop(self) -> dict:
        self._stop.set()
        self._thread.join()
        return {k: round(v, 1) for k, v in self.peaks.items()}


def _reset_peak() -> None:
    """Reset this process's peak RSS (Linux: ``echo 5 > /proc/self/clear_refs`` resets VmHWM)."""
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")


def _peak_mb() -> float:
    """Peak RSS since the last :func:`_reset_peak` (VmHWM of /proc/self/status), MB."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmHWM in /proc/self/status")


def machine() -> dict:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem_gb = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    import pyarrow
    import torch
    import prefect
    return {"cpu": cpu, "cores": os.cpu_count(), "ram_gb": round(mem_gb, 1), "python": platform.python_version(),
            "torch": torch.__version__, "pyarrow": pyarrow.__version__, "prefect": prefect.__version__,
            "os": platform.platform()}


# ---------------------------------------------------------------------------------------------
# References
# ---------------------------------------------------------------------------------------------

def bare_read_seconds(files: list[str], repeats: int = 3) -> float:
    """Best of ``repeats`` wall times of ``pyarrow.parquet.read_table`` over ``files`` (warm page cache)."""
    import pyarrow.parquet as pq
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        for f in files:
            pq.read_table(f)
        best = min(best, time.perf_counter() - t0)
    return best


def bare_plain_epoch(organic, dim: int, batch: int, lr: float, weight_decay: float, seed: int) -> float:
    """Seconds of one plain biased-MF epoch written with nothing but torch, on the same ratings.

    The floor the trainer is measured against: sparse embeddings, SparseAdam, squared error plus the
    per-example L2 penalty, shuffled mini-batches. No probe errors, no early stopping, no id maps.
    """
    import numpy as np
    import pandas as pd
    import torch
    from torch import nn

    torch.manual_seed(seed)
    u_codes, users = pd.factorize(organic["user_id"])
    i_codes, items = pd.factorize(organic["item_id"])
    U, I = torch.from_numpy(u_codes.astype(np.int64)), torch.from_numpy(i_codes.astype(np.int64))
    R = torch.from_numpy(organic["rating"].to_numpy(np.float32))
    P, Q = nn.Embedding(len(users), dim, sparse=True), nn.Embedding(len(items), dim, sparse=True)
    BU, BI = nn.Embedding(len(users), 1, sparse=True), nn.Embedding(len(items), 1, sparse=True)
    for e in (P, Q):
        nn.init.normal_(e.weight, 0.0, 0.05)
    for e in (BU, BI):
        nn.init.zeros_(e.weight)
    mu = float(R.mean())
    opt = torch.optim.SparseAdam([P.weight, Q.weight, BU.weight, BI.weight], lr=lr)
    n = len(R)
    t0 = time.perf_counter()
    perm = torch.randperm(n)
    for s in range(0, n, batch):
        b = perm[s:s + batch]
        u, i, r = U[b], I[b], R[b]
        p, q, bu, bi = P(u), Q(i), BU(u).squeeze(-1), BI(i).squeeze(-1)
        pred = mu + bu + bi + (p * q).sum(-1)
        loss = ((pred - r) ** 2).mean() + weight_decay * ((p * p).sum(-1) + (q * q).sum(-1) + bu * bu + bi * bi).mean()
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
    return time.perf_counter() - t0


# ---------------------------------------------------------------------------------------------
# One size, in its own process
# ---------------------------------------------------------------------------------------------

def run_case(size: str, logs: Path, work: Path, method: str, seed_epochs: int, runner: str,
             profile: Path | None, shared: bool = False, finetune_epochs: int = 0, cold: bool = False) -> dict:
    os.environ["PREFECT_HOME"] = str(work / "prefect-home")
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("DO_NOT_TRACK", "1")
    os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "180")   # a loaded, shared machine
    Path(os.environ["PREFECT_HOME"]).mkdir(parents=True, exist_ok=True)
    import torch

    from flows.nightly import nightly_for
    from tasks.config import Config
    from tasks.ingest import logs as ingest
    from tasks.ingest import store
    from tasks.ledger import read_ledger
    from tasks.workspace import Workspace

    torch.set_num_threads(1)
    out_base = {"rss_base_mb": _rss_now_mb()}     # interpreter + torch + pandas/pyarrow + Prefect client, no data
    load_start = os.getloadavg()
    cpu0 = time.process_time()
    dates = ingest.list_partition_dates(str(logs))
    if len(dates) < 3:
        raise SystemExit(f"{logs}: need at least 3 daily partitions, found {len(dates)}")
    changes = {"window.days": len(dates), "debias.method": method, "model.threads": 1, "runtime.runner": runner}
    if finetune_epochs:
        changes["model.finetune_epochs"] = finetune_epochs     # fewer epochs: the night's time, not its memory
    cfg = Config().updated(changes).with_overrides(
        logs=str(logs), workspace=str(work / "ws"), shared=(work / "shared").as_uri() if shared else "")
    ws = Workspace.at(cfg.paths.workspace)
    files = {d: [str(p) for p in sorted((logs / f"dt={d}").glob("*.parquet"))] for d in dates}
    stored, seed_day, night_day = dates[:-2], dates[-2], dates[-1]
    out: dict = {"size": size, "method": method, "runner": runner, "days": len(dates), "shared": shared, **out_base,
                 "finetune_epochs": cfg.model.finetune_epochs}

    # 1. store the first days with the plain ingest functions (what the ingest tasks call)
    pre_files = [f for d in stored for f in files[d]]
    # --cold (the largest sizes) stores the days once and skips the ingest ratio's extra passes.
    out["bare_read_stored_s"] = float("nan") if cold else bare_read_seconds(pre_files, repeats=2)
    t_read = t_store = 0.0
    rows = 0
    for d in stored:
        t0 = time.perf_counter()
        res = ingest.read_partition(str(logs), d, cfg)
        t1 = time.perf_counter()
        ingest.write_quarantine(ws, d, res.rejected)
        ingest.check_rejected_share(res, cfg)
        store.write_partition(ws, d, res.valid_table)
        t_read += t1 - t0
        t_store += time.perf_counter() - t1
        rows += res.rows_read
    # The bare read is the best of two passes over warm files; read + validate gets the same protocol
    # (a second pass over the same days, nothing written), so first-call costs do not land on one side.
    if not cold:
        t0 = time.perf_counter()
        for d in stored:
            ingest.read_partition(str(logs), d, cfg)
        t_read = min(t_read, time.perf_counter() - t0)
    out.update(stored_days=len(stored), stored_rows=rows, stored_read_validate_s=t_read, stored_write_s=t_store)
    out["rss_after_store_mb"] = _rss_mb()
    OUT.mkdir(parents=True, exist_ok=True)
    (OUT / f"progress-{size}.json").write_text(json.dumps(out, default=float, indent=1))

    # 2. seed night: a short cold start so the measured night is a warm fine-tune. With ``cold`` there is
    # none: the seed day is stored like the others and the measured night is that short cold start.
    seed_cfg = cfg.updated({"model.max_epochs": seed_epochs, "model.patience": seed_epochs + 1})
    if cold:
        res = ingest.read_partition(str(logs), seed_day, cfg)
        store.write_partition(ws, seed_day, res.valid_table)
        del res
        seed = {"version_id": None, "state": None, "durations": {}}
        cfg = seed_cfg
    else:
        t0 = time.perf_counter()
        seed = nightly_for(seed_cfg)(cfg=seed_cfg, run_date=seed_day)
        out["seed_night_s"] = time.perf_counter() - t0
    out["cold"] = cold
    out["seed_durations"] = seed["durations"]
    out["rss_after_seed_mb"] = _rss_mb()

    # 3. measured night
    profiler = None
    if profile is not None:
        from pyinstrument import Profiler
        profiler = Profiler(interval=0.005)
        profiler.start()
    _reset_peak()
    out["rss_before_night_mb"] = _rss_now_mb()
    started = time.perf_counter()

    def progress(facts: dict) -> None:
        OUT.mkdir(parents=True, exist_ok=True)
        (OUT / f"progress-{size}.json").write_text(json.dumps(
            {**out, **facts, "night_elapsed_s": time.perf_counter() - started}, default=float, indent=1))
    memory = StageMemory(progress)
    t0 = time.perf_counter()
    # base_from: warm-start from the seed night even when the gate held it (a 2-epoch cold start may lose
    # to its shadow); the measured night is then the production case, a fine-tune of the previous model.
    night = nightly_for(cfg)(cfg=cfg, run_date=night_day, base_from=seed["version_id"], cold=cold)
    out["night_s"] = time.perf_counter() - t0
    if profiler is not None:
        profiler.stop()
        profile.write_text(profiler.output_text(unicode=False, color=False, show_all=False))
    out["rss_after_night_mb"] = _rss_mb()
    out["night_peak_rss_mb"] = _peak_mb()          # the measured night alone (VmHWM reset before it)
    out["stage_peak_rss_mb"] = memory.stop()
    led = read_ledger(ws)
    row = led[led["run_date"] == night_day].iloc[-1]
    out["durations"] = json.loads(row["durations_json"])
    out["counts"] = night["counts"]
    out["epoch_seconds"] = night["epoch_seconds"]
    out["evaluation"] = {k: (v["mae"] if v else None) for k, v in night["evaluation"].items()}
    out["state"] = night["state"]
    out["seed_state"] = seed["state"]
    if shared:
        out["shared_seed"], out["shared_night"] = seed["shared"], night["shared"]

    # 4. references on the same data
    out["bare_read_night_s"] = bare_read_seconds(files[night_day], repeats=5)
    # The window read as the night does it, against a bare pyarrow read of the same stored files (best of
    # two each, warm page cache on both sides).
    window_files = [str(ws.partition(ws.store, d) / store.PART_FILE)
                    for d in store.window_dates(ws, night_day, cfg.window.days)]
    out["bare_read_window_s"] = bare_read_seconds(window_files, repeats=2)
    best = float("inf")
    for _ in range(2):
        t0 = time.perf_counter()
        window = store.read_window(ws, night_day, cfg.window.days, categorical=True, times=False)   # as steps.read_window
        best = min(best, time.perf_counter() - t0)
        if _ == 0:
            del window
    out["window_read_s"] = best
    organic = window.loc[window["source"] == "organic", ["user_id", "item_id", "rating"]]
    del window
    m = cfg.model
    out["bare_plain_epoch_s"] = min(bare_plain_epoch(organic, m.dim, m.batch_size, m.learning_rate,
                                                     m.weight_decay, m.seed) for _ in range(2))
    out["organic_ratings"] = len(organic)
    del organic
    out["budget_mb"] = cfg.debias.memory_budget_mb
    out["peak_rss_mb"] = _rss_mb()
    out["cpu_s"] = time.process_time() - cpu0
    out["load_start"], out["load_end"] = load_start, os.getloadavg()
    return out


def _subprocess_case(size: str, logs: Path, method: str, seed_epochs: int, runner: str, profile: bool,
                     shared: bool = False, finetune_epochs: int = 0, cold: bool = False) -> dict:
    with tempfile.TemporaryDirectory(prefix=f"tarewise-bench-night-{size}-") as tmp:
        cmd = [sys.executable, str(Path(__file__).resolve()), "--case", size, "--logs", str(logs), "--work", tmp,
               "--method", method, "--seed-epochs", str(seed_epochs), "--runner", runner]
        if profile:
            cmd += ["--profile"]
        if shared:
            cmd += ["--shared"]
        if finetune_epochs:
            cmd += ["--finetune-epochs", str(finetune_epochs)]
        if cold:
            cmd += ["--cold"]
        env = {**os.environ, "PYTHONPATH": str(ROOT), "OMP_NUM_THREADS": "1"}
        done = subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=ROOT)
    if done.returncode != 0:
        raise RuntimeError(f"case {size} failed:\n{done.stderr[-6000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


# ---------------------------------------------------------------------------------------------
# Tables and plot
# ---------------------------------------------------------------------------------------------

def _order(results: dict) -> list[dict]:
    return sorted(results.values(), key=lambda r: r["counts"]["window_ratings"])


def render_tables(results: dict, info: dict) -> str:
    rows = _order(results)
    lines = [f"Machine: {info.get('cpu')}, {info.get('cores')} cores, {info.get('ram_gb')} GB RAM; "
             f"Python {info.get('python')}, torch {info.get('torch')}, pyarrow {info.get('pyarrow')}, "
             f"prefect {info.get('prefect')}. One torch thread. Load average (1 min) at start / end of each "
             "case in the last column: the machine is shared.", ""]
    lines += ["Stage wall seconds of the measured night (run ledger):", "",
              "| size | window ratings | users | items | " + " | ".join(STAGES) + " | night total | load start/end |",
              "|---|---:|---:|---:|" + "---:|" * (len(STAGES) + 2)]
    for r in rows:
        c, d = r["counts"], r["durations"]
        lines.append(f"| {r.get('label', r['size'])} | {c['window_ratings']:,} | {c['window_users']:,} | {c['window_items']:,} | "
                     + " | ".join(f"{d.get(s, 0):.1f}" for s in STAGES)
                     + f" | {r['night_s']:.0f} | {r['load_start'][0]:.1f} / {r['load_end'][0]:.1f} |")
    lines += ["", "Ratios to the references measured in the same process on the same data:", "",
              "| size | ingest stage (s) | bare read of the day (s) | ratio | store 28 days: read+validate (s) "
              "| bare read of the 28 days (s) | ratio | + store write (s) | candidate epoch (s) | shadow epoch (s) "
              "| bare plain epoch (s) | candidate / bare | shadow / bare | candidate / shadow | ratings/s (candidate) |",
              "|---|" + "---:|" * 15]
    for r in rows:
        cand, shadow = r["epoch_seconds"]["candidate"], r["epoch_seconds"]["shadow"]
        ce = sum(cand) / len(cand)
        se = sum(shadow) / len(shadow) if shadow else float("nan")
        bare = r["bare_plain_epoch_s"]
        ing = r["durations"]["ingest"]
        lines.append(
            f"| {r.get('label', r['size'])} | {ing:.2f} | {r['bare_read_night_s']:.3f} | {ing / r['bare_read_night_s']:.1f}x "
            f"| {r['stored_read_validate_s']:.1f} | {r['bare_read_stored_s']:.1f} "
            f"| {r['stored_read_validate_s'] / r['bare_read_stored_s']:.2f}x | {r['stored_write_s']:.1f} "
            f"| {ce:.1f} | {se:.1f} | {bare:.1f} | {ce / bare:.2f}x | {se / bare:.2f}x | {ce / se:.2f}x "
            f"| {r['organic_ratings'] / ce:,.0f} |")
    lines += ["", "Memory (whole benchmark process; the data is held as pandas frames and torch tensors):", "",
              "| size | ratings | users x items as float32 (MB) | memory_budget_mb | RSS after storing (MB) "
              "| peak RSS (MB) | peak / million ratings (MB) |", "|---|" + "---:|" * 6]
    for r in rows:
        c = r["counts"]
        dense = c["window_users"] * c["window_items"] * 4 / 2**20
        lines.append(f"| {r.get('label', r['size'])} | {c['window_ratings']:,} | {dense:,.0f} | {r['budget_mb']:.0f} "
                     f"| {r['rss_after_store_mb']:.0f} | {r['peak_rss_mb']:.0f} "
                     f"| {r['peak_rss_mb'] / (c['window_ratings'] / 1e6):.0f} |")
    return "\n".join(lines) + "\n"


def render_scale(results: dict) -> str:
    """Memory per window rating and the window read against a bare read (rows of runs that measured them)."""
    rows = [r for r in _order(results) if "night_peak_rss_mb" in r]
    if not rows:
        return ""
    lines = ["Memory of the measured night and its window read. Fixed base = RSS at start (interpreter, torch, "
             "pandas/pyarrow, Prefect client; no data) + 2 x memory_budget_mb (the two scoring threads' blocks, "
             "bounded by the config, whatever the size). Per rating = (night peak - base) / window ratings; "
             "slope = extra peak per extra rating from the previous size:", "",
             "| size | window ratings | base (MB) | night peak RSS (MB) | peak stage | **bytes / rating above base** "
             "| slope (bytes / rating) | window read (s) | bare read of the same files (s) | **ratio** |",
             "|---|" + "---:|" * 9]
    prev = None
    for r in rows:
        n = r["counts"]["window_ratings"]
        base = r["rss_base_mb"] + 2 * r["budget_mb"]
        peak = r["night_peak_rss_mb"]
        stages = r.get("stage_peak_rss_mb", {})
        top = max(stages, key=stages.get) if stages else ""
        slope = f"{(peak - prev[1]) * 2**20 / (n - prev[0]):.0f}" if prev and n > prev[0] else ""
        lines.append(f"| {r.get('label', r['size'])} | {n:,} | {base:.0f} | {peak:,.0f} | {top} "
                     f"| **{(peak - base) * 2**20 / n:.0f}** | {slope} | {r['window_read_s']:.2f} "
                     f"| {r['bare_read_window_s']:.2f} | **{r['window_read_s'] / r['bare_read_window_s']:.2f}x** |")
        prev = (n, peak)
    lines += ["", "Peak RSS per stage (MB, 20 ms samples):", "",
              "| size | " + " | ".join(STAGES) + " |", "|---|" + "---:|" * len(STAGES)]
    for r in rows:
        st = r.get("stage_peak_rss_mb", {})
        lines.append(f"| {r.get('label', r['size'])} | " + " | ".join(f"{st.get(x, float('nan')):,.0f}" for x in STAGES)
                     + " |")
    return "\n".join(lines) + "\n"


def render_shared(results: dict) -> str:
    """The shared copy's cost: the first copy (seed night) and a night's increment (measured night)."""
    lines = ["Shared copy (paths.shared = a file:// folder on the same disk; copy time after the night's "
             "ledger row, so not in the stage table):", "",
             "| size | first copy: files | MB | s | a night's copy: files | MB | s | night total (s) | copy / night |",
             "|---|" + "---:|" * 8]
    for r in _order(results):
        a, b = r["shared_seed"], r["shared_night"]
        lines.append(f"| {r.get('label', r['size'])} | {a['files']} | {a['bytes'] / 1e6:.0f} | {a['seconds']:.2f} "
                     f"| {b['files']} | {b['bytes'] / 1e6:.0f} | {b['seconds']:.2f} | {r['night_s']:.0f} "
                     f"| {b['seconds'] / r['night_s']:.2%} |")
    return "\n".join(lines) + "\n"


def render_plot(results: dict, path: Path) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    rows = _order(results)
    if not rows:
        return
    x = [r["counts"]["window_ratings"] for r in rows]
    fig, (a, b) = plt.subplots(1, 2, figsize=(12.5, 4.4), layout="constrained")
    for s in STAGES:
        a.plot(x, [max(r["durations"].get(s, 0), 1e-2) for r in rows], marker="o", label=s)
    a.plot(x, [r["night_s"] for r in rows], marker="s", color="black", lw=2, label="whole night")
    ref = rows[0]["night_s"]
    a.plot(x, [ref * v / x[0] for v in x], ls=":", color="grey", label="slope 1 (linear)")
    a.set(xscale="log", yscale="log", xlabel="ratings in the 30-day window", ylabel="wall seconds",
          title="Measured night: seconds per stage")
    a.legend(fontsize=7, loc="center left", bbox_to_anchor=(1.0, 0.5))
    b.plot(x, [r["peak_rss_mb"] for r in rows], marker="o", label="peak RSS")
    b.plot(x, [r["counts"]["window_users"] * r["counts"]["window_items"] * 4 / 2**20 for r in rows], marker="x",
           ls="--", label="users x items float32 (not allocated)")
    ref_mb = rows[0]["peak_rss_mb"]
    b.plot(x, [ref_mb * v / x[0] for v in x], ls=":", color="grey", label="slope 1 (linear)")
    b.set(xscale="log", yscale="log", xlabel="ratings in the 30-day window", ylabel="MB", title="Memory")
    b.legend(fontsize=7)
    fig.suptitle("tarewise nightly benchmark (invented data)", fontsize=10)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1M,10M", help="comma list of 1M, 10M, 30M, 100M")
    ap.add_argument("--logs", default="/tmp/tarewise-bench-logs", help="where bench/make_logs.py writes the logs")
    ap.add_argument("--method", default="calibrated", help="debias.method of the candidate")
    ap.add_argument("--seed-epochs", type=int, default=2, help="epochs of the cold-start seed night")
    ap.add_argument("--runner", default="thread", choices=["thread", "dask"])
    ap.add_argument("--profile", action="store_true", help="write bench/out/profile-<size>.txt (pyinstrument)")
    ap.add_argument("--render", action="store_true", help="only re-render table and plot from nightly.json")
    ap.add_argument("--shared", action="store_true", help="also keep a shared copy (paths.shared) and time it")
    ap.add_argument("--finetune-epochs", type=int, default=0,
                    help="model.finetune_epochs of the measured night (0: the config's); memory does not depend on it")
    ap.add_argument("--cold", action="store_true", help="no seed night: the measured night is a cold start capped "
                    "at --seed-epochs epochs (for the largest sizes, where a seed night costs as much again)")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    ap.add_argument("--work", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.case:
        prof = OUT / f"profile-{args.case}.txt" if args.profile else None
        r = run_case(args.case, Path(args.logs), Path(args.work), args.method, args.seed_epochs, args.runner, prof,
                     args.shared, args.finetune_epochs, args.cold)
        print(json.dumps(r, default=float))
        return
    sys.path.insert(0, str(ROOT / "bench"))
    from make_logs import SIZES, make_logs
    store_path = OUT / "nightly.json"
    saved = json.loads(store_path.read_text()) if store_path.exists() else {"machine": {}, "results": {}}
    if not args.render:
        saved["machine"] = machine()
        for size in [s.strip() for s in args.sizes.split(",") if s.strip()]:
            if size not in SIZES:
                ap.error(f"unknown size {size!r}; choose from {', '.join(SIZES)}")
            folder, gen_s = make_logs(Path(args.logs), size)
            print(f"{size}: logs in {folder} ({'reused' if not gen_s else f'generated in {gen_s:.0f} s'})",
                  file=sys.stderr, flush=True)
            t0 = time.perf_counter()
            r = _subprocess_case(size, folder, args.method, args.seed_epochs, args.runner, args.profile, args.shared,
                                 args.finetune_epochs, args.cold)
            r["case_wall_s"] = time.perf_counter() - t0
            key = size if args.method == "calibrated" and args.runner == "thread" else f"{size}-{args.method}-{args.runner}"
            key += "-shared" if args.shared else ""
            key += f"-cold-{args.seed_epochs}ep" if args.cold else ""
            key += f"-ft{args.finetune_epochs}" if args.finetune_epochs and not args.cold else ""
            r["label"] = key
            if store_path.exists():    # another size may have finished meanwhile (runs side by side)
                saved["results"] = {**json.loads(store_path.read_text())["results"], **saved["results"]}
            saved["results"][key] = r
            OUT.mkdir(parents=True, exist_ok=True)
            store_path.write_text(json.dumps(saved, indent=1, default=float))
            print(f"{size}: night {r['night_s']:.0f} s, stages {r['durations']}, peak {r['peak_rss_mb']:.0f} MB",
                  file=sys.stderr, flush=True)
    main_rows = {k: v for k, v in saved["results"].items()
                 if v["method"] == "calibrated" and v["runner"] == "thread" and not v.get("shared")}
    text = "# Nightly benchmark\n\n" + render_tables(main_rows, saved["machine"]) + "\n" + render_scale(main_rows)
    others = {k: v for k, v in saved["results"].items() if k not in main_rows}
    if others:
        text += "\nOther settings (candidate method / runner as named):\n\n" + render_tables(others, saved["machine"])
    with_shared = {k: v for k, v in saved["results"].items() if v.get("shared")}
    if with_shared:
        text += "\n" + render_shared(with_shared)
    (OUT / "nightly.md").write_text(text)
    render_plot(main_rows, OUT / "nightly.png")
    print(text)


if __name__ == "__main__":
    main()
