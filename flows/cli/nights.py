"""Commands that run nights: ``run`` (one night), ``demo`` (the invented sample end to end), ``backfill``
(a range of past nights, or with ``--sweep`` a grid of settings over the range).

Exit codes: 0 done; 1 a night or the range failed, or the workspace lock is held (``run``: 3); 2 a flag
or the config is wrong.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from flows.cli.common import (REPO, ConfigOpt, DaskAddressOpt, LogsOpt, RunnerOpt, SharedOpt, WorkspaceOpt, console,
                              err, fail, load, prefect_env, with_runner)
from flows.cli.progress import LedgerProgress, duration
from flows.cli.tables import plan_table, print_backfill, print_night, sweep_table


def run(date: Optional[str] = typer.Option(None, "--date", "-d", help="Run date YYYY-MM-DD (default: yesterday "
                                          "in runtime.timezone)."),
        config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
        shared: Optional[str] = SharedOpt, runner: Optional[str] = RunnerOpt,
        dask_address: Optional[str] = DaskAddressOpt,
        cold: bool = typer.Option(False, "--cold", help="Start from scratch instead of warm-starting from the live "
                                  "version (which is refused when its files are damaged; see `tarewise status`)."),
        verbose: bool = typer.Option(False, "--verbose", "-v")) -> None:
    """One nightly run. Exits non-zero on failure; the live version is then untouched."""
    cfg = with_runner(load(config, logs, workspace, shared), runner, dask_address)
    prefect_env(cfg.paths.workspace, verbose)
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
            out = nightly_for(cfg)(cfg=cfg, run_date=date, cold=cold)
    except Exception as exc:  # noqa: BLE001 - the CLI reports every failure the same way
        fail(exc, "run")
    print_night(out)


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
    prefect_env(cfg.paths.workspace, verbose)
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
                fail(exc, f"demo night {d}")
            progress.advance(bar)
    for out in outs:
        print_night(out)
    ws = Path(cfg.paths.workspace)
    live = [o for o in outs if o.get("state") == "live"]
    console.print(f"\nworkspace:   {ws}")
    if live:
        console.print(f"predictions: {ws / 'versions' / live[-1]['version_id'] / 'predictions.parquet'}")
    console.print(f"reports:     {ws / 'reports'}")
    console.print("(demo data is invented: a fictional library network's reading app)")


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
        console.print(plan_table(plan, f"backfill plan {start}..{end} (--live {live}): {len(to_run)} to run, "
                                        f"{len(plan) - len(to_run)} to skip"))
        typical = typical_night_seconds(ws)
        if to_run and typical:
            console.print(f"estimated time: about {duration(typical * len(to_run))} "
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
    prefect_env(cfg.paths.workspace, verbose)
    from flows.backfill import BackfillStopped, backfill as backfill_flow
    try:
        with LedgerProgress(lambda: [ws], "backfill", len(to_run), "backfill", typical_night_seconds(ws)):
            out = backfill_flow(cfg=cfg, start=start, end=end, live=live, force=force)
    except BackfillStopped as exc:
        err.print(f"[bold red]backfill stopped[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    except LockHeld as exc:
        err.print(f"[bold red]backfill refused[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    except Exception as exc:  # noqa: BLE001
        fail(exc, "backfill")
    print_backfill(out)


def _sweep(cfg, ws, start: str, end: str, specs: list[str], dry_run: bool, verbose: bool) -> None:
    """``backfill --sweep``: replay ``start..end`` once per setting of the grid, each in a scratch workspace."""
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
    prefect_env(cfg.paths.workspace, verbose)
    from flows.backfill import sweep as sweep_flow
    from tasks.lock import LockHeld
    from tasks.workspace import Workspace

    def scratch_ledgers():
        return [Workspace.at(p.parent.parent) for p in root.glob("s*/ledger/runs.parquet")]

    try:
        with LedgerProgress(scratch_ledgers, "sweep", len(grid) * len(dates), "sweep", None):
            out = sweep_flow(cfg=cfg, start=start, end=end, grid=grid)
    except LockHeld as exc:
        err.print(f"[bold red]sweep refused[/]: {exc}", highlight=False)
        raise typer.Exit(1)
    except Exception as exc:  # noqa: BLE001
        fail(exc, "sweep")
    console.print(sweep_table(out["rows"], start, end))
    console.print(f"results: {out['results']}\nscratch workspaces: {out['root']}")
    if any(r["error"] for r in out["rows"]):
        raise typer.Exit(1)
