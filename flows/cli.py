"""``tarewise`` command line. The edge: parses flags, validates config once, calls flows and tasks.

Prefect is imported lazily, after :func:`_prefect_env` has set quiet local defaults, so commands that
need no flow (``versions``, ``score``) start fast and never touch ``~/.prefect`` by accident.
"""

from __future__ import annotations

import os
import sys
from contextlib import contextmanager
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Keep a rating model honest against a random probe: nightly runs, versions, reports.")
# Piped output (logs, CI) gets a fixed, wide layout instead of rich's 80-column default.
console = Console(width=None if sys.stdout.isatty() else 140)
err = Console(stderr=True, width=None if sys.stderr.isatty() else 140)

REPO = Path(__file__).resolve().parent.parent
ConfigOpt = typer.Option(None, "--config", "-c", help="TOML config (see configs/example.toml).")
LogsOpt = typer.Option(None, "--logs", help="Logs folder or URI; overrides config and TAREWISE_LOGS.")
WorkspaceOpt = typer.Option(None, "--workspace", help="Workspace folder; overrides config and TAREWISE_WORKSPACE.")
RunnerOpt = typer.Option(None, "--runner", help="Task runner for the parallel parts of a night: 'thread' or 'dask' "
                         "(overrides runtime.runner).")
SharedOpt = typer.Option(None, "--shared", help="Shared copy (pyarrow.fs URI or folder); overrides config and "
                         "TAREWISE_SHARED; '' turns it off.")
DaskAddressOpt = typer.Option(None, "--dask-address", help="Existing Dask scheduler, e.g. tcp://host:8786 "
                              "(overrides runtime.dask_address; implies --runner dask).")


def _prefect_env(workspace: str, verbose: bool = False) -> None:
    """Quiet, self-contained Prefect defaults; anything already set in the environment wins."""
    os.environ.setdefault("PREFECT_HOME", str(Path(workspace).expanduser().resolve() / ".prefect-home"))
    Path(os.environ["PREFECT_HOME"]).mkdir(parents=True, exist_ok=True)
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "INFO" if verbose else "WARNING")
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("DO_NOT_TRACK", "1")


def load(config: Optional[Path], logs: Optional[str], workspace: Optional[str], shared: Optional[str] = None):
    from tasks.config import ConfigError, load_config
    try:
        cfg = load_config(config, logs=logs, workspace=workspace, shared=shared)
    except ConfigError as exc:
        err.print(f"[bold red]config error[/]: {exc}", markup=True, highlight=False)
        raise typer.Exit(2)
    ws = cfg.paths.workspace
    if "://" in ws and not ws.startswith("file://"):
        # Checked before anything touches the path (Prefect's home folder lives in the workspace).
        err.print(f"[bold red]config error[/]: paths.workspace = {ws!r}: the workspace must be a local or "
                  "shared POSIX folder (publishing a version relies on an atomic rename, which object stores "
                  "lack); logs may live on an object store (paths.logs / --logs), and a copy of the store and "
                  "versions too (paths.shared / --shared).", highlight=False)
        raise typer.Exit(2)
    return cfg.with_overrides(workspace=ws.removeprefix("file://")) if ws.startswith("file://") else cfg


def with_runner(cfg, runner: Optional[str], dask_address: Optional[str]):
    """``cfg`` with the command line's task-runner choice applied (validated like the config file)."""
    updates: dict = {}
    if dask_address:
        updates.update({"runtime.runner": "dask", "runtime.dask_address": dask_address})
    if runner:
        if dask_address and runner != "dask":
            err.print("--dask-address needs --runner dask (or no --runner)")
            raise typer.Exit(2)
        updates["runtime.runner"] = runner
    if not updates:
        return cfg
    from tasks.config import ConfigError
    try:
        return cfg.updated(updates)
    except ConfigError as exc:
        err.print(f"[bold red]--runner[/]: {exc}", highlight=False)
        raise typer.Exit(2)


def _fail(exc: BaseException, what: str) -> None:
    err.print(f"[bold red]{what} failed[/]: {type(exc).__name__}: {exc}", highlight=False)
    raise typer.Exit(1)


@app.command()
def run(date: Optional[str] = typer.Option(None, "--date", "-d", help="Run date YYYY-MM-DD (default: yesterday "
                                          "in runtime.timezone)."),
        config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
        shared: Optional[str] = SharedOpt, runner: Optional[str] = RunnerOpt,
        dask_address: Optional[str] = DaskAddressOpt, verbose: bool = typer.Option(False, "--verbose", "-v")) -> None:
    """One nightly run. Exits non-zero on failure; the live version is then untouched."""
    cfg = with_runner(load(config, logs, workspace, shared), runner, dask_address)
    _prefect_env(cfg.paths.workspace, verbose)
    from tasks.lock import LockHeld, check_free
    from tasks.workspace import Workspace
    try:
        check_free(Workspace.at(cfg.paths.workspace).lock, cfg.runtime.lock_stale_seconds)
    except LockHeld as exc:
        err.print(f"[bold red]refused[/]: {exc}", highlight=False)
        raise typer.Exit(3)
    from flows.nightly import nightly_for
    try:
        with console.status(f"nightly run for {date or 'yesterday'} ..."):
            out = nightly_for(cfg)(cfg=cfg, run_date=date)
    except Exception as exc:  # noqa: BLE001 - the CLI reports every failure the same way
        _fail(exc, "run")
    _print_night(out)


def _print_night(out: dict) -> None:
    if out["status"] != "done":
        console.print(f"{out['run_date']}: [yellow]{out['status']}[/] - {out.get('message', '')}")
        return
    t = Table(title=f"night {out['run_date']} -> version {out['version_id']} ({out['state']})")
    for col in ("model", "held-out n", "MAE", "MAE interval", "RMSE"):
        t.add_column(col)
    for name in ("candidate", "shadow", "live"):
        e = out["evaluation"].get(name)
        if e:
            t.add_row(name, str(e["n"]), f"{e['mae']:.4f}", f"{e['mae_lo']:.4f} - {e['mae_hi']:.4f}",
                      f"{e['rmse']:.4f}")
    console.print(t)
    console.print(f"gate: {'promote' if out['gate']['promote'] else 'hold'} - {out['gate']['reason']}",
                  highlight=False)
    for a in out.get("alerts", []):
        console.print(f"[bold magenta]alert[/] {a}", highlight=False)


@app.command()
def score(pairs: Path = typer.Option(..., "--pairs", help="Parquet with user_id, item_id columns."),
          out: Path = typer.Option(..., "--out", help="Where to write the scored Parquet."),
          version: Optional[str] = typer.Option(None, "--version", help="Version id (default: live)."),
          config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Score arbitrary (user_id, item_id) pairs; unknown ids get a fallback score and a flag."""
    cfg = load(config, None, workspace)
    from tasks.publish.scoring_io import score_pairs
    try:
        n, used, fallbacks = score_pairs(cfg, pairs, out, version)
    except Exception as exc:  # noqa: BLE001
        _fail(exc, "score")
    console.print(f"scored {n} pairs with version {used} -> {out} ({fallbacks} with a fallback score)")


@app.command("versions")
def versions_cmd(config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """List versions with state, run date, held-out MAE and gate reason."""
    cfg = load(config, None, workspace)
    from tasks.publish.versions import list_versions
    from tasks.workspace import Workspace
    t = Table(title=f"versions in {cfg.paths.workspace}")
    for col in ("version", "state", "run date", "method", "MAE cand.", "MAE shadow", "MAE live", "gate"):
        t.add_column(col, no_wrap=True)
    reasons = []
    for m in list_versions(Workspace.at(cfg.paths.workspace)):
        mt = m.get("metrics", {})
        f = lambda k: f"{mt[k]['mae']:.4f}" if mt.get(k) else "-"  # noqa: E731
        gate = m.get("gate", {})
        t.add_row(m["version_id"], m["state"], m.get("run_date", ""), m.get("method", ""), f("candidate"),
                  f("shadow"), f("live"), f"{'promote' if gate.get('promote') else 'hold'} vs "
                  f"{gate.get('compared_to', '?')}")
        reasons.append(f"{m['version_id']}: {gate.get('reason', '')}")
    console.print(t)
    for line in reasons:
        console.print(line, highlight=False, soft_wrap=True)


@app.command()
def report(date: Optional[str] = typer.Option(None, "--date", "-d", help="Night to render (default: latest)."),
           config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Re-render a night's HTML report and its JSON twin from stored metrics."""
    cfg = load(config, None, workspace)
    from tasks.monitor.report import render_report
    from tasks.workspace import Workspace
    ws = Workspace.at(cfg.paths.workspace)
    if date is None:
        from tasks.monitor.metrics_store import read_metrics
        m = read_metrics(ws)
        if m.empty:
            err.print(f"no stored metrics in {ws.metrics}; run a night first")
            raise typer.Exit(1)
        date = str(m["run_date"].max())
    try:
        html, js = render_report(ws, date, cfg)
    except Exception as exc:  # noqa: BLE001
        _fail(exc, "report")
    console.print(f"report: {html}\njson:   {js}")


@app.command()
def demo(folder: Optional[Path] = typer.Option(None, "--dir", help="Folder for demo workspace (default: a new "
                                               "temporary folder)."),
         nights: int = typer.Option(0, "--nights", help="Nights to run (default: every day in the sample)."),
         fresh_data: bool = typer.Option(False, "--generate", help="Generate new demo logs instead of using "
                                         "the committed sample_parquet/."),
         verbose: bool = typer.Option(False, "--verbose", "-v")) -> None:
    """Run the invented reading-app demo end to end and print where predictions and reports are."""
    import tempfile
    from tasks.config import load_config
    base = folder or Path(tempfile.mkdtemp(prefix="tarewise-demo-"))
    base.mkdir(parents=True, exist_ok=True)
    logs = REPO / "sample_parquet"
    if fresh_data:
        from tasks.operate.demo_data import generate
        logs = base / "logs"
        generate(logs, start_date="2026-11-01", days=max(nights, 4), n_members=1500, n_titles=800,
                 organic_per_day=2500, seed=11, probe_share=0.06)
    cfg = load_config(REPO / "configs" / "demo.toml", logs=str(logs), workspace=str(base / "workspace"))
    _prefect_env(cfg.paths.workspace, verbose)
    from tasks.ingest.logs import list_partition_dates
    dates = list_partition_dates(str(logs))
    if nights:
        dates = dates[:nights]
    if not dates:
        err.print(f"no dt=YYYY-MM-DD partitions under {logs}")
        raise typer.Exit(1)
    from flows.nightly import nightly_for
    from rich.progress import Progress
    outs = []
    with Progress(console=console) as progress:
        bar = progress.add_task("demo nights", total=len(dates))
        for d in dates:
            try:
                outs.append(nightly_for(cfg)(cfg=cfg, run_date=d))
            except Exception as exc:  # noqa: BLE001
                _fail(exc, f"demo night {d}")
            progress.advance(bar)
    for out in outs:
        _print_night(out)
    ws = Path(cfg.paths.workspace)
    live = [o for o in outs if o.get("state") == "live"]
    console.print(f"\nworkspace:   {ws}")
    if live:
        console.print(f"predictions: {ws / 'versions' / live[-1]['version_id'] / 'predictions.parquet'}")
    console.print(f"reports:     {ws / 'reports'}")
    console.print("(demo data is invented: a fictional library network's reading app)")


class _LedgerProgress:
    """A rich progress bar fed by polling run ledgers from a background thread while a flow runs in
    the main thread: the ledger is what the flow records anyway, so the flow needs no UI hook and the
    bar shows exactly what is recorded. Time left = remaining nights x mean seconds per finished night
    (before the first finishes: the median duration of earlier runs in the workspace, marked "~")."""

    def __init__(self, ledgers, kind: str, total: int, title: str, typical: Optional[float]) -> None:
        import threading

        import pandas as pd
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress, SpinnerColumn, TextColumn,
                                   TimeElapsedColumn)
        self._ledgers, self._kind, self._total, self._typical = ledgers, kind, total, typical
        self._t0 = pd.Timestamp.now(tz="UTC")
        self._stop = threading.Event()
        self._progress = Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(),
                                  MofNCompleteColumn(), TimeElapsedColumn(), TextColumn("{task.fields[eta]}"),
                                  console=console, transient=False)
        first = f"about {_duration(typical * total)} left (from earlier runs)" if typical else "estimating time left"
        self._task = self._progress.add_task(title, total=total, eta=first)
        self._thread = threading.Thread(target=self._poll, daemon=True)

    def __enter__(self):
        self._progress.__enter__()
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join(timeout=5)
        self._update()
        self._progress.__exit__(*exc)

    def _poll(self) -> None:
        while not self._stop.wait(0.5):
            try:
                self._update()
            except Exception:  # noqa: BLE001 - a torn read of a ledger must not kill the bar
                pass

    def _update(self) -> None:
        import pandas as pd
        from tasks.ledger import read_ledger
        finished, current = 0, ""
        for ws in self._ledgers():
            df = read_ledger(ws)
            df = df[(df["kind"] == self._kind) & (df["started_at"] >= self._t0)]
            finished += int(df["status"].isin(["done", "skipped", "failed"]).sum())
            running = df[df["status"] == "running"]
            if len(running):
                current = str(running["run_date"].iloc[-1])
        elapsed = (pd.Timestamp.now(tz="UTC") - self._t0).total_seconds()
        left = self._total - finished
        if finished:
            eta = f"about {_duration(elapsed / finished * left)} left" if left else "finishing"
        else:
            eta = self._progress.tasks[0].fields["eta"]
        self._progress.update(self._task, completed=min(finished, self._total), eta=eta,
                              description=f"night {current}" if current else
                              ("done" if finished >= self._total else "starting"))


def _duration(seconds: float) -> str:
    seconds = int(round(seconds))
    if seconds < 90:
        return f"{seconds}s"
    if seconds < 5400:
        return f"{seconds // 60}m{seconds % 60:02d}s"
    return f"{seconds // 3600}h{(seconds % 3600) // 60:02d}m"


def _plan_table(plan, title: str) -> Table:
    t = Table(title=title)
    for col in ("date", "action", "why"):
        t.add_column(col, overflow="fold")
    for p in plan:
        t.add_row(p.run_date, "[green]run[/]" if p.action == "run" else "[dim]skip[/]", p.reason)
    return t


@app.command()
def backfill(start: str = typer.Option(..., "--start", help="First date YYYY-MM-DD."),
             end: str = typer.Option(..., "--end", help="Last date YYYY-MM-DD (inclusive)."),
             live: str = typer.Option("last", "--live", help="'last': only the last night may go live (the "
                                      "nights before publish without switching); 'each': every night may."),
             force: bool = typer.Option(False, "--force", help="Re-run dates already done."),
             dry_run: bool = typer.Option(False, "--dry-run", help="Print which dates run or are skipped, and "
                                          "why; run nothing."),
             sweep: Optional[list[str]] = typer.Option(None, "--sweep", help="KEY=V1,V2,... (repeatable): replay "
                                                        "the range once per combination, each in a scratch "
                                                        "workspace, and print the held-out probe MAE table."),
             config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
             shared: Optional[str] = SharedOpt, runner: Optional[str] = RunnerOpt,
             dask_address: Optional[str] = DaskAddressOpt,
             verbose: bool = typer.Option(False, "--verbose", "-v")) -> None:
    """Replay past nights date by date, carrying the model forward; resumable, skips dates already done."""
    cfg = with_runner(load(config, logs, workspace, shared), runner, dask_address)
    from tasks.operate.backfill_plan import LIVE_MODES, BackfillError, plan_backfill, typical_night_seconds
    from tasks.workspace import Workspace
    if live not in LIVE_MODES:
        err.print(f"--live must be one of {', '.join(LIVE_MODES)}, got {live!r}")
        raise typer.Exit(2)
    ws = Workspace.at(cfg.paths.workspace)
    if sweep:
        if force or live != "last":
            err.print("--force and --live do not apply to --sweep (each setting replays the range afresh in its "
                      "own scratch workspace and never goes live)")
            raise typer.Exit(2)
        _sweep(cfg, ws, start, end, sweep, dry_run, verbose)
        return
    try:
        plan = plan_backfill(ws, cfg, start, end, force)
    except BackfillError as exc:
        err.print(f"[bold red]backfill[/]: {exc}", highlight=False)
        raise typer.Exit(2)
    to_run = [p for p in plan if p.action == "run"]
    if dry_run:
        console.print(_plan_table(plan, f"backfill plan {start}..{end} (--live {live}): {len(to_run)} to run, "
                                        f"{len(plan) - len(to_run)} to skip"))
        typical = typical_night_seconds(ws)
        if to_run and typical:
            console.print(f"estimated time: about {_duration(typical * len(to_run))} "
                          f"(median of earlier runs: {typical:.0f}s a night)")
        return
    if not to_run:
        console.print(f"nothing to do: all {len(plan)} date(s) in {start}..{end} are done (--force re-runs them)")
        return
    from tasks.lock import LockHeld, check_free
    try:
        check_free(ws.lock, cfg.runtime.lock_stale_seconds)
    except LockHeld as exc:
        err.print(f"[bold red]backfill refused[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    _prefect_env(cfg.paths.workspace, verbose)
    from flows.backfill import BackfillStopped, backfill as backfill_flow
    try:
        with _LedgerProgress(lambda: [ws], "backfill", len(to_run), "backfill", typical_night_seconds(ws)):
            out = backfill_flow(cfg=cfg, start=start, end=end, live=live, force=force)
    except BackfillStopped as exc:
        err.print(f"[bold red]backfill stopped[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    except LockHeld as exc:
        err.print(f"[bold red]backfill refused[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    except Exception as exc:  # noqa: BLE001
        _fail(exc, "backfill")
    _print_backfill(out)


def _print_backfill(out: dict) -> None:
    t = Table(title=f"backfill {out['start']}..{out['end']} (--live {out['live_mode']})")
    for col in ("date", "status", "version", "state", "seconds", "held-out MAE", "note"):
        t.add_column(col, overflow="fold")
    for n in out["nights"]:
        mae = f"{n['mae']:.4f} (n={n['heldout']})" if n.get("mae") is not None else "-"
        t.add_row(n["run_date"], n["status"], n.get("version_id") or "-", n.get("state") or "-",
                  f"{n['seconds']:.1f}", mae, n.get("message") or "")
    console.print(t)
    if out["skipped"]:
        console.print(f"{len(out['skipped'])} date(s) skipped as already done (--dry-run shows each, --force re-runs)")
    console.print(f"live version: {out['live_version'] or 'none'}", highlight=False)
    if out.get("retention"):
        r = out["retention"]
        console.print(f"retention as of {r['as_of']}: {len(r['versions'])} version(s), "
                      f"{len(r['quarantine_dates'])} quarantine partition(s), {r['metrics_rows']} metric row(s) removed")


def _sweep(cfg, ws, start: str, end: str, specs: list[str], dry_run: bool, verbose: bool) -> None:
    from tasks.operate import sweep as sweeps
    from tasks.operate.backfill_plan import BackfillError, date_range
    try:
        dates = date_range(start, end)
        grid = sweeps.expand_grid(cfg, sweeps.parse_specs(specs))
    except (BackfillError, sweeps.SweepError) as exc:
        err.print(f"[bold red]sweep[/]: {exc}", highlight=False)
        raise typer.Exit(2)
    root = sweeps.sweep_root(ws, start, end)
    if dry_run:
        console.print(f"sweep {start}..{end}: {len(grid)} setting(s) x {len(dates)} night(s), scratch "
                      f"workspaces under {root} (the main live version is never touched)")
        for k, g in enumerate(grid):
            console.print(f"  s{k:02d}  {sweeps.label(g)}", highlight=False)
        return
    _prefect_env(cfg.paths.workspace, verbose)
    from flows.backfill import sweep as sweep_flow
    from tasks.lock import LockHeld
    from tasks.workspace import Workspace

    def scratch_ledgers():
        return [Workspace.at(p.parent.parent) for p in root.glob("s*/ledger/runs.parquet")]

    try:
        with _LedgerProgress(scratch_ledgers, "sweep", len(grid) * len(dates), "sweep", None):
            out = sweep_flow(cfg=cfg, start=start, end=end, grid=grid)
    except LockHeld as exc:
        err.print(f"[bold red]sweep refused[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    except Exception as exc:  # noqa: BLE001
        _fail(exc, "sweep")
    t = Table(title=f"held-out probe MAE by setting, mean over nights {start}..{end}")
    for col in ("setting", "nights", "held-out n", "MAE", "shadow MAE", "note"):
        t.add_column(col, overflow="fold")
    f = lambda x: f"{x:.4f}" if x is not None else "-"  # noqa: E731
    for r in out["rows"]:
        note = f"failed {r['error']}" if r["error"] else ("lowest MAE" if r["best"] else "")
        if r["skipped"]:
            note = (note + "; " if note else "") + f"{r['skipped']} night(s) too little data"
        t.add_row(r["label"], str(r["nights"]), str(r["heldout"]), f(r["mae"]), f(r["shadow_mae"]), note)
    console.print(t)
    console.print(f"results: {out['results']}\nscratch workspaces: {out['root']}")
    if any(r["error"] for r in out["rows"]):
        raise typer.Exit(1)


@app.command()
def status(runs: int = typer.Option(10, "--runs", help="How many ledger rows to show."),
           days: int = typer.Option(7, "--days", help="Alerts of this many nights up to the newest run."),
           config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
           shared: Optional[str] = SharedOpt) -> None:
    """Live version, shared copy, lock, last runs from the ledger, and recent alerts."""
    cfg = load(config, None, workspace, shared)
    from tasks.operate.status import status as workspace_status
    from tasks.workspace import Workspace
    s = workspace_status(Workspace.at(cfg.paths.workspace), cfg.runtime.timezone, cfg.runtime.lock_stale_seconds,
                         runs, days)
    console.print(f"workspace: {s['workspace']}", highlight=False)
    lv = s["live"]
    if lv:
        mae = f", held-out MAE {lv['mae']:.4f} (n={lv['heldout']})" if lv.get("mae") is not None else ""
        console.print(f"live: [bold]{lv['version_id']}[/] (night {lv['run_date']}, {lv['method']}{mae}); "
                      f"since {lv['since']}: {lv['reason']}", highlight=False)
    else:
        console.print("live: none yet")
    if cfg.paths.shared:
        from tasks.operate.shared_copy import SharedCopyError, pending_files
        try:
            n = pending_files(Workspace.at(cfg.paths.workspace), cfg.paths.shared)
            console.print(f"shared copy: {cfg.paths.shared}: " + (f"{n} file(s) not copied yet (`tarewise share`)"
                                                                 if n else "up to date"), highlight=False)
        except SharedCopyError as exc:
            console.print(f"shared copy: {exc}", highlight=False)
    lk = s["lock"]
    if lk:
        state = "stale (will be taken over)" if lk["stale"] else "held"
        console.print(f"lock: {state} by {lk.get('what', '?')} (pid {lk.get('pid')} on {lk.get('host')})",
                      highlight=False)
    else:
        console.print("lock: free")
    t = Table(title=f"last {len(s['runs'])} run(s)")
    for col in ("started (UTC)", "kind", "night", "status", "version", "state", "seconds", "message"):
        t.add_column(col, overflow="fold")
    colour = {"done": "green", "failed": "red", "interrupted": "red", "running": "yellow", "skipped": "yellow"}
    for r in s["runs"]:
        c = colour.get(r["status"], "white")
        t.add_row(r["started_at"], r["kind"], r["run_date"], f"[{c}]{r['status']}[/]", r["version_id"] or "-",
                  r["state"] or "-", "-" if r["seconds"] is None else f"{r['seconds']:.1f}", r["message"][:120])
    console.print(t)
    if not s["alerts"]:
        console.print(f"alerts: none in the {s['days']} nights up to {s['as_of']}")
        return
    a = Table(title=f"alerts in the {s['days']} nights up to {s['as_of']}")
    for col in ("night", "severity", "kind", "status", "explanation"):
        a.add_column(col, overflow="fold")
    for r in s["alerts"]:
        a.add_row(str(r.get("run_date")), str(r.get("severity")), str(r.get("kind")), str(r.get("status")),
                  str(r.get("explanation", ""))[:200])
    console.print(a)


@app.command()
def rollback(to: str = typer.Option(..., "--to", help="Version id to make live again (see `tarewise versions`)."),
             reason: str = typer.Option("manual rollback", "--reason", help="Recorded in the ledger and pointer."),
             config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
             shared: Optional[str] = SharedOpt) -> None:
    """Make an earlier version live again (one atomic switch), recorded in the run ledger; then the
    shared copy, if one is set, follows."""
    cfg = load(config, None, workspace, shared)
    from tasks.lock import LockHeld
    from tasks.operate.rollback import RollbackError, rollback as do_rollback
    from tasks.workspace import Workspace
    try:
        out = do_rollback(Workspace.at(cfg.paths.workspace), to, reason, cfg.runtime.timezone,
                          cfg.runtime.lock_stale_seconds)
    except (RollbackError, LockHeld) as exc:
        err.print(f"[bold red]rollback refused[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    if out["run_id"] is None:
        console.print(f"{to} is already live; nothing changed")
        return
    if out["state_before"] == "held":
        err.print(f"note: {to} was held by the promotion gate when it was published (see `tarewise versions`)")
    console.print(f"live: {out['previous'] or 'none'} -> {out['live']} (ledger run {out['run_id']})", highlight=False)
    _share_after(cfg, f"rollback to {to} is done here")


@app.command()
def prune(as_of: Optional[str] = typer.Option(None, "--as-of", help="Reference date for the day-based limits "
                                              "(default: newest completed run date in the ledger)."),
          config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
          shared: Optional[str] = SharedOpt) -> None:
    """Apply the retention settings: old versions (never live or pinned), quarantine and metrics by days;
    then the shared copy, if one is set, follows."""
    cfg = load(config, None, workspace, shared)
    from tasks.dates import DateError, parse_date
    from tasks.lock import LockHeld, workspace_lock
    from tasks.operate.retention import apply_retention, default_as_of
    from tasks.workspace import Workspace
    ws = Workspace.at(cfg.paths.workspace)
    if as_of is not None:
        try:
            parse_date(as_of, "--as-of")
        except DateError as exc:
            err.print(f"--as-of: {exc}")
            raise typer.Exit(2)
    try:
        with workspace_lock(ws.lock, "prune", cfg.runtime.lock_stale_seconds):
            result = apply_retention(ws, cfg.retention, as_of or default_as_of(ws, cfg.runtime.timezone))
    except LockHeld as exc:
        err.print(f"[bold red]prune refused[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    console.print(result.summary(), highlight=False)
    _share_after(cfg, "prune is done here")


def _share_after(cfg, done: str) -> None:
    """After a command that changed the workspace: bring the shared copy up to date (holding the lock)."""
    if not cfg.paths.shared:
        return
    from tasks.lock import LockHeld, workspace_lock
    from tasks.operate.shared_copy import SharedCopy, SharedCopyError, push
    from tasks.workspace import Workspace
    ws = Workspace.at(cfg.paths.workspace)
    try:
        with workspace_lock(ws.lock, "copy to the shared copy", cfg.runtime.lock_stale_seconds):
            console.print(push(ws, SharedCopy.at(cfg.paths.shared, ws)).summary(), highlight=False)
    except (SharedCopyError, LockHeld) as exc:
        err.print(f"[bold red]{done}, but the shared copy was not updated[/]: {exc}\n"
                  "run `tarewise share` to catch up", highlight=False)
        raise typer.Exit(1)


@contextmanager
def _shared_copy_command(cfg, what: str):
    """Yield ``(workspace, shared copy)`` for ``share``/``restore``; map their errors to exit codes
    (2: the setting is wrong or the copy belongs to another workspace; 1: I/O failed or the lock is held)."""
    if not cfg.paths.shared:
        err.print("no shared copy configured: set paths.shared in the config, TAREWISE_SHARED, or --shared")
        raise typer.Exit(2)
    from tasks.lock import LockHeld
    from tasks.operate.shared_copy import SharedCopy, SharedCopyError, SharedCopyRefused
    from tasks.workspace import Workspace
    ws = Workspace.at(cfg.paths.workspace)
    try:
        yield ws, SharedCopy.at(cfg.paths.shared, ws)
    except SharedCopyRefused as exc:
        err.print(f"[bold red]{what} refused[/]: {exc}", highlight=False)
        raise typer.Exit(2)
    except (SharedCopyError, LockHeld) as exc:
        err.print(f"[bold red]{what} failed[/]: {exc}", highlight=False)
        raise typer.Exit(1)


@app.command()
def share(dry_run: bool = typer.Option(False, "--dry-run", help="List what would be copied and removed; change "
                                       "nothing."),
          take_over: bool = typer.Option(False, "--take-over", help="Write even though the shared copy's live "
                                         "pointer was written by another workspace (this one becomes its only "
                                         "writer)."),
          config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
          shared: Optional[str] = SharedOpt) -> None:
    """Bring the shared copy (paths.shared) up to date now: new partitions and versions, then the live
    pointer, then removals. Nights do this themselves; use it to catch up after a failed copy."""
    cfg = load(config, None, workspace, shared)
    from tasks.lock import workspace_lock
    from tasks.operate.shared_copy import plan_push, push
    with _shared_copy_command(cfg, "share") as (ws, target):
        if dry_run:
            plan = plan_push(ws, target)
            for rel in plan.uploads:
                console.print(f"copy   {rel}", highlight=False)
            for rel in plan.clears + plan.deletes:
                console.print(f"remove {rel}", highlight=False)
            console.print(f"{len(plan.uploads)} file(s) to copy ({plan.bytes / 1e6:.1f} MB), "
                          f"{len(plan.clears) + len(plan.deletes)} to remove on {target.uri}", highlight=False)
            return
        with workspace_lock(ws.lock, "copy to the shared copy", cfg.runtime.lock_stale_seconds):
            console.print(push(ws, target, take_over=take_over).summary(), highlight=False)


@app.command()
def restore(config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
            shared: Optional[str] = SharedOpt) -> None:
    """Fill the workspace from the shared copy: every partition, whole version and history it lacks,
    and the live pointer if it has none. Nothing local is overwritten. (A night on a workspace that
    has never run does this by itself.)"""
    cfg = load(config, None, workspace, shared)
    from tasks.lock import workspace_lock
    from tasks.operate.shared_copy import restore as do_restore
    with _shared_copy_command(cfg, "restore") as (ws, target):
        with workspace_lock(ws.lock, "restore from the shared copy", cfg.runtime.lock_stale_seconds):
            console.print(do_restore(ws, target).summary(), highlight=False)


@app.command()
def serve(work_pool: Optional[str] = typer.Option(None, "--work-pool", help="Register the deployments on this "
                                                  "Prefect work pool (run `prefect worker start --pool NAME`) "
                                                  "instead of serving them from this process."),
          register_only: bool = typer.Option(False, "--register-only", help="Register (or update) the "
                                             "deployments and exit."),
          config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
          verbose: bool = typer.Option(False, "--verbose", "-v")) -> None:
    """Register the nightly (cron) and backfill deployments and serve them; needs a Prefect server."""
    cfg = load(config, logs, workspace)
    _prefect_env(cfg.paths.workspace, verbose)
    from prefect.settings import get_current_settings
    if not get_current_settings().api.url:
        err.print("[bold red]serve needs a Prefect server[/]: PREFECT_API_URL is not set, and schedules do not fire "
                  "on Prefect's temporary local server. Start one (`prefect server start`), then\n"
                  "  export PREFECT_API_URL=http://127.0.0.1:4200/api\nand run `tarewise serve` again. One-off runs "
                  "need no server: `tarewise run`, `tarewise backfill`.", highlight=False, soft_wrap=True)
        raise typer.Exit(2)
    from flows.deployments import build_deployments
    from tasks.config import ConfigError
    try:
        deployments = build_deployments(cfg)
    except ConfigError as exc:
        err.print(f"[bold red]config error[/]: {exc}", highlight=False)
        raise typer.Exit(2)
    if work_pool or register_only:
        for d in deployments:
            dep_id = d.apply(work_pool_name=work_pool) if work_pool else d.apply()
            console.print(f"registered {d.flow_name}/{d.name} ({dep_id})", highlight=False)
        if work_pool:
            console.print(f"start a worker to run them: prefect worker start --pool {work_pool}")
        return
    from prefect import serve as prefect_serve
    console.print(f"serving nightly at '{cfg.runtime.schedule}' ({cfg.runtime.timezone}) and backfill; Ctrl-C stops")
    prefect_serve(*deployments)


def main() -> None:  # pragma: no cover - console entry point
    app()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(app())
