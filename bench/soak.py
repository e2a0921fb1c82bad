"""Soak test of unattended operation (not in CI): `tarewise serve` against a real local Prefect server,
a one-minute cron, random SIGKILLs of the run and of serve, SIGTERMs of serve, restarts.

Fast clock: the logs hold ``--days`` generated past days ending yesterday (UTC). The workspace starts
with the first day done (`tarewise run`); after that every scheduled run (one a minute) catches up the
oldest owed nights, at most ``runtime.catch_up_per_run`` of them (``--per-run``), so the whole history
is worked through by scheduled runs, in date order, while the chaos loop kills things.

Kills land while a night is at work (a ``running`` ledger row), at a random moment 0-8 s later, so they hit
every stage rather than process start-up. Afterwards it asserts: every date is done exactly once in the ledger; each ledger row's Prefect flow run
is in the matching state (done -> Completed, interrupted -> Crashed or Cancelled, failed/refused -> Failed
or Crashed); live names a whole version (``tarewise status`` finds no problem). It prints the figures:
nights, kills by kind, ledger outcomes, Prefect states, minutes.

    nice -n 10 python bench/soak.py --root /tmp/soak --days 62 --per-run 3 > /tmp/soak.log 2>&1 &

Needs the `prefect` executable next to this Python. Everything lives under ``--root`` (server database,
Prefect home, logs, workspace); nothing outside it is touched. Kills target only processes it started.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from collections import Counter
from datetime import date, timedelta
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

TOML = """
[model]
dim = 4
max_epochs = 4
finetune_epochs = 2

[evaluate]
bootstrap = 20

[gate]
tolerance_mae = 1.0
max_segment_regression = 2.0
min_heldout = 1

[retention]
keep_versions = 5

[runtime]
shadow = false
timezone = "UTC"
schedule = "* * * * *"
catch_up = "all"
catch_up_per_run = {per_run}
lock_wait_seconds = 150
lock_stale_seconds = 600
flow_timeout_seconds = 900
workers = 1
min_free_mb = 0
"""


def log(msg: str) -> None:
    print(f"[{time.strftime('%H:%M:%S')}] {msg}", flush=True)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_health(url: str, seconds: float = 180) -> None:
    t0 = time.time()
    while time.time() - t0 < seconds:
        try:
            with urllib.request.urlopen(url + "/health", timeout=3) as r:
                if r.status == 200:
                    return
        except OSError:
            pass
        time.sleep(1)
    raise SystemExit(f"Prefect server at {url} did not answer in {seconds} s")


def children(pid: int) -> list[int]:
    import psutil
    try:
        return [c.pid for c in psutil.Process(pid).children(recursive=True)]
    except psutil.NoSuchProcess:
        return []


def settled(ws) -> set[str]:
    from tasks.ledger import latest_by_date
    latest = latest_by_date(ws)
    return set() if latest.empty else {str(d) for d in latest.index[latest["status"].isin(["done", "skipped"])]}


def running(ws) -> bool:
    from tasks.ledger import read_ledger
    try:
        return bool((read_ledger(ws)["status"] == "running").any())
    except Exception:  # noqa: BLE001 - a ledger being replaced right now: try again next loop
        return False


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--root", type=Path, default=Path("/tmp/tarewise-soak"))
    ap.add_argument("--days", type=int, default=62)
    ap.add_argument("--per-run", type=int, default=3)
    ap.add_argument("--minutes", type=float, default=80, help="Give up after this long.")
    ap.add_argument("--chaos-every", type=float, nargs=2, default=(60, 150), help="Seconds between kills (range); "
                    "each kill waits for a night at work (a running ledger row), then 0-8 s more.")
    ap.add_argument("--seed", type=int, default=15)
    a = ap.parse_args()
    rng = random.Random(a.seed)
    root = a.root.resolve()
    if root.exists() and any(root.iterdir()):
        raise SystemExit(f"{root} is not empty; give a fresh --root")
    root.mkdir(parents=True, exist_ok=True)
    port = free_port()
    api = f"http://127.0.0.1:{port}/api"
    env = dict(os.environ, PREFECT_HOME=str(root / "prefect-home"), PREFECT_API_URL=api,
               PREFECT_SERVER_ANALYTICS_ENABLED="false", DO_NOT_TRACK="1", PREFECT_LOGGING_LEVEL="WARNING",
               PYTHONPATH=str(REPO), PREFECT_SERVER_API_PORT=str(port))
    os.environ.update(env)   # this process talks to the same server (ledger checks, Prefect client)

    from tasks.operate.demo_data import generate
    from tasks.workspace import Workspace
    end = date.today() - timedelta(days=1)
    start = end - timedelta(days=a.days - 1)
    generate(root / "logs", start_date=start.isoformat(), days=a.days, n_members=300, n_titles=200,
             organic_per_day=300, seed=a.seed, probe_share=0.1)
    (root / "soak.toml").write_text(TOML.format(per_run=a.per_run))
    ws = Workspace.at(root / "ws")
    dates = [(start + timedelta(days=k)).isoformat() for k in range(a.days)]
    cli = [sys.executable, "-m", "flows.cli"]
    common = ["--config", str(root / "soak.toml"), "--logs", str(root / "logs"), "--workspace", str(ws.root)]

    server_log = open(root / "server.log", "w")
    server = subprocess.Popen([str(Path(sys.executable).parent / "prefect"), "server", "start", "--host", "127.0.0.1",
                               "--port", str(port)], env=env, stdout=server_log, stderr=subprocess.STDOUT,
                              start_new_session=True)
    serve = None
    serve_log = open(root / "serve.log", "a")
    kills: Counter = Counter()
    t_start = time.time()
    try:
        wait_health(api)
        log(f"server up on {api}; {a.days} days {dates[0]}..{dates[-1]}, {a.per_run} night(s) per minute run")
        seed = subprocess.run([*cli, "run", "--date", dates[0], *common], env=env, cwd=REPO, capture_output=True,
                              text=True, timeout=900)
        log(f"seed night {dates[0]}: exit {seed.returncode}")

        def start_serve():
            return subprocess.Popen([*cli, "serve", *common], env=env, cwd=REPO, stdout=serve_log,
                                    stderr=subprocess.STDOUT)

        serve = start_serve()
        next_chaos = time.time() + rng.uniform(*a.chaos_every)
        deadline = t_start + a.minutes * 60
        last_count = -1
        while time.time() < deadline:
            done = settled(ws)
            if len(done) != last_count:
                last_count = len(done)
                log(f"{len(done)}/{a.days} nights settled; kills so far {dict(kills)}")
            if set(dates) <= done:
                break
            if serve.poll() is not None:
                log(f"serve exited ({serve.returncode}); restarting")
                serve = start_serve()
            if time.time() >= next_chaos and running(ws):   # kill while a night is at work, at a random moment
                time.sleep(rng.uniform(0, 8))
                next_chaos = time.time() + rng.uniform(*a.chaos_every)
                runs = children(serve.pid)
                action = rng.choices(["kill-run", "kill-serve", "term-serve"], [0.5, 0.3, 0.2])[0]
                if action == "kill-run" and runs:
                    victim = rng.choice(runs)
                    os.kill(victim, signal.SIGKILL)
                    kills["SIGKILL run"] += 1
                    log(f"SIGKILL flow-run process {victim}")
                elif action == "kill-serve" or (action == "kill-run" and not runs):
                    serve.kill()
                    serve.wait()
                    kills["SIGKILL serve"] += 1
                    log(f"SIGKILL serve {serve.pid} (its {len(runs)} child process(es) left running); restart in 5 s")
                    time.sleep(5)
                    serve = start_serve()
                else:
                    serve.terminate()
                    try:
                        serve.wait(60)
                    except subprocess.TimeoutExpired:
                        serve.kill()
                        serve.wait()
                    kills["SIGTERM serve"] += 1
                    log(f"SIGTERM serve {serve.pid}; restart in 5 s")
                    time.sleep(5)
                    serve = start_serve()
            time.sleep(2)
        minutes = (time.time() - t_start) / 60
        log(f"loop ended after {minutes:.1f} min")
        # Quiet end: stop serve gracefully, let orphaned runs finish, then check.
        serve.terminate()
        try:
            serve.wait(90)
        except subprocess.TimeoutExpired:
            serve.kill()
        time.sleep(5)
        return report(ws, dates, kills, minutes, api, root, common, env, cli)
    finally:
        if serve is not None and serve.poll() is None:
            serve.kill()
        for pid in children(server.pid):
            try:
                os.kill(pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
        server.terminate()
        try:
            server.wait(30)
        except subprocess.TimeoutExpired:
            server.kill()


def report(ws, dates, kills, minutes, api, root, common, env, cli) -> int:
    from prefect.client.orchestration import get_client

    from tasks.ledger import read_ledger
    df = read_ledger(ws)
    nightly = df[df["kind"] == "nightly"]
    done_counts = nightly[nightly["status"] == "done"].groupby("run_date").size()
    problems = []
    not_done = [d for d in dates if done_counts.get(d, 0) == 0]
    twice = {d: int(n) for d, n in done_counts.items() if n > 1}
    if not_done:
        problems.append(f"{len(not_done)} date(s) never done: {not_done[:5]}...")
    if twice:
        problems.append(f"dates done more than once: {twice}")
    expect = {"done": {"COMPLETED"}, "interrupted": {"CRASHED", "CANCELLED"}, "failed": {"FAILED", "CRASHED"},
              "refused": {"FAILED", "CRASHED"}, "skipped": {"COMPLETED"}}
    states: Counter = Counter()
    mismatch = []
    with get_client(sync_client=True) as client:
        for _, r in df.iterrows():
            fid = r["flow_run_id"]
            if not isinstance(fid, str) or not fid:
                states[f"{r['status']} / no flow run"] += 1
                continue
            state = client.read_flow_run(fid).state.type.value
            states[f"{r['status']} / {state}"] += 1
            if state not in expect.get(r["status"], set()):
                mismatch.append((r["run_date"], r["status"], state, r["message"][:120] if r["message"] else ""))
        from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterState, FlowRunFilterStateType
        from prefect.client.schemas.objects import StateType
        stuck = client.read_flow_runs(flow_run_filter=FlowRunFilter(state=FlowRunFilterState(
            type=FlowRunFilterStateType(any_=[StateType.RUNNING]))))
    if mismatch:
        problems.append(f"{len(mismatch)} ledger row(s) whose Prefect state does not match: {mismatch[:5]}")
    # The workspace doctor alone (no PREFECT_API_URL: serve was stopped, so its deployments are paused,
    # which status would rightly name; that is recorded separately below).
    local = {k: v for k, v in env.items() if k != "PREFECT_API_URL"}
    status = subprocess.run([*cli, "status", "--config", common[1], "--workspace", common[5]], env=local, cwd=REPO,
                            capture_output=True, text=True, timeout=300)
    live_whole = status.returncode == 0 and "problem:" not in status.stdout
    if not live_whole:
        problems.append("status reports a problem:\n" + status.stdout[-3000:] + status.stderr[-2000:])
    paused = subprocess.run([*cli, "status", "--config", common[1], "--workspace", common[5]], env=env, cwd=REPO,
                            capture_output=True, text=True, timeout=300).stdout.count("is paused")
    figures = {"nights_in_range": len(dates), "nights_done": int((done_counts > 0).sum()),
               "scheduled_nights_done": int(((nightly["status"] == "done") & (nightly["run_date"] != dates[0])).sum()),
               "kills": dict(kills), "ledger_outcomes": dict(Counter(df["status"])),
               "ledger_vs_prefect": dict(states), "prefect_runs_still_running": len(stuck),
               "live_whole": live_whole, "deployments_paused_after_stop": paused, "minutes": round(minutes, 1), "problems": problems}
    (root / "soak.json").write_text(json.dumps(figures, indent=2))
    print(json.dumps(figures, indent=2))
    return 1 if problems else 0


if __name__ == "__main__":
    raise SystemExit(main())
