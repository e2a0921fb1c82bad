"""Commands that run nights: ``run`` (one night), ``demo`` (the invented sample end to end), ``backfill``
(a range of past nights, or with ``--sweep`` a grid of settings over the range).

Exit codes: 0 done; 1 a night or the range failed, or the workspace lock is held (``run``: 3); 2 a flag,
the config, a date, the logs folder or the workspace is wrong (checked before anything starts).
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal, Optional

import typer

from flows.cli.common import (REPO, ConfigOpt, DaskAddressOpt, LogsOpt, Runner, RunnerOpt, SharedOpt, VerboseOpt,
                              WorkspaceOpt, console, err, fail, load, prefect_env, with_runner)
from flows.cli.preflight import check_date, check_logs, user_error, writable_workspace
from flows.cli.progress import LedgerProgress, duration
from flows.cli.tables import plan_table, print_backfill, print_night, print_night_files, sweep_table


def run(date: Optional[str] = typer.Option(None, "--date", "-d", help="Run date YYYY-MM-DD (default: yesterday "
                                          "in runtime.timezone)."),
        config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
        shared: Optional[str] = SharedOpt, runner: Runner = RunnerOpt,
        dask_address: Optional[str] = DaskAddressOpt,
        cold: bool = typer.Option(False, "--cold", help="Start from scratch instead of warm-starting from the live "
                                  "version (which is refused when its files are damaged; see `tarewise status`)."),
        force: bool = typer.Option(False, "--force", help="Run the night even when it is already done with the same "
                                   "input files and config (otherwise it is not run again; one line says so)."),
        verbose: bool = VerboseOpt) -> None:
    """One nightly run. Exits non-zero on failure; the live version is then untouched."""
    if date is not None:
        date = check_date(date, "--date")
    cfg = with_runner(load(config, logs, workspace, shared), runner, dask_address)
    check_logs(cfg, date)
    writable_workspace(cfg)
    prefect_env(cfg.paths.workspace, verbose)
    from tasks.lock import LockHeld, check_free
    from tasks.workspace import Workspace
    ws = Workspace.at(cfg.paths.workspace)
    try:
        check_free(ws.lock, cfg.runtime.lock_stale_seconds)
    except LockHeld as exc:
        err.print(f"[bold red]refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(3)
    from flows.nightly import nightly_for
    try:
        with console.status(f"nightly run for {date or 'yesterday'} ..."):
            out = nightly_for(cfg)(cfg=cfg, run_date=date, cold=cold, force=force)
    except Exception as exc:  # noqa: BLE001 - the CLI reports every failure the same way
        fail(exc, "run", verbose)
    print_night(out)
    print_night_files(ws.root, out)


def demo(folder: Optional[Path] = typer.Option(None, "--dir", help="Demo folder: the workspace goes to DIR/workspace "
                                               "(and, with --generate, the logs to DIR/logs). Default: the "
                                               "workspace configs/demo.toml names, ./tarewise-demo/workspace."),
         workspace: Optional[str] = typer.Option(None, "--workspace", help="Workspace folder (overrides --dir; "
                                                 "TAREWISE_WORKSPACE is ignored here, so the demo never writes "
                                                 "into a real workspace by accident)."),
         nights: Optional[int] = typer.Option(None, "--nights", help="Run only the first N nights "
                                              "(default: every night in the sample)."),
         fresh_data: bool = typer.Option(False, "--generate", help="Write the invented logs again with "
                                         "tasks/operate/demo_story.py into the demo folder instead of reading "
                                         "the committed sample_parquet/."),
         verbose: bool = VerboseOpt) -> None:
    """Run the invented reading-app demo end to end; say what to look at and what to try next.

    The invented nights hold a trial night without probe ratings, a bad batch and a campaign that shifts
    selection skew. Nights already done in the demo's workspace are not run again."""
    import tomllib

    from tasks.config import ConfigError, load_config, parse_config
    if nights is not None and nights < 1:
        user_error(f"--nights: {nights} is not a number of nights; give 1 or more, or leave it out for every night")
    demo_toml = REPO / "configs" / "demo.toml"
    try:
        named = parse_config(tomllib.loads(demo_toml.read_text(encoding="utf-8")), str(demo_toml)).paths.workspace
        ws_path = Path(workspace) if workspace else (folder / "workspace" if folder else Path(named))
        base = folder or ws_path.parent
        logs = REPO / "sample_parquet"
        cfg = load_config(demo_toml, logs=str(logs), workspace=str(ws_path))
    except ConfigError as exc:
        user_error(str(exc))
    writable_workspace(cfg)
    if fresh_data or not logs.is_dir():
        from tasks.operate.demo_story import write_story
        logs = base / "logs"
        write_story(logs)
        cfg = cfg.with_overrides(logs=str(logs))
    from tasks.ingest.logs import list_partition_dates
    from tasks.ledger import latest_by_date
    from tasks.workspace import Workspace
    dates = list_partition_dates(str(logs))[:nights]
    ws = Workspace.at(cfg.paths.workspace)
    latest = latest_by_date(ws)
    done = [d for d in dates if d in latest.index and latest.loc[d, "status"] in ("done", "skipped")]
    todo = [d for d in dates if d not in done]
    if done:
        console.print(f"{len(done)} of {len(dates)} demo night(s) already done in {ws.root}; "
                      + (f"running the other {len(todo)}" if todo else "nothing to run")
                      + " (delete the folder, or pick another with --dir, to start over)", highlight=False,
                      soft_wrap=True)
    if todo:
        prefect_env(cfg.paths.workspace, verbose)
        from rich.progress import Progress

        from flows.nightly import nightly_for
        with Progress(console=console) as progress:
            bar = progress.add_task("demo nights", total=len(todo))
            for d in todo:
                try:
                    nightly_for(cfg)(cfg=cfg, run_date=d)
                except Exception as exc:  # noqa: BLE001
                    fail(exc, f"demo night {d}", verbose)
                progress.advance(bar)
    from flows.cli.tables import print_demo_summary
    print_demo_summary(ws, dates, logs)


def backfill(start: str = typer.Option(..., "--start", help="First date YYYY-MM-DD."),
             end: str = typer.Option(..., "--end", help="Last date YYYY-MM-DD (inclusive)."),
             live: Literal["last", "each"] = typer.Option("last", "--live", help="'last': only the last night may "
                                                          "go live (the nights before publish without switching); "
                                                          "'each': every night may."),
             force: bool = typer.Option(False, "--force", help="Re-run dates already done."),
             dry_run: bool = typer.Option(False, "--dry-run", help="Print which dates run or are skipped, and "
                                          "why, and how far the backfill gets; run nothing."),
             sweep: Optional[list[str]] = typer.Option(None, "--sweep", metavar="KEY=V1,V2,... (repeatable)",
                                                        help="Replay the range once per combination of the "
                                                        "values given (repeat the option for more keys), each in a "
                                                        "scratch workspace, and print the held-out probe MAE "
                                                        "table."),
             config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
             shared: Optional[str] = SharedOpt, runner: Runner = RunnerOpt,
             dask_address: Optional[str] = DaskAddressOpt, verbose: bool = VerboseOpt) -> None:
    """Replay past nights date by date, carrying the model forward; resumable, skips dates already done."""
    start, end = check_date(start, "--start", "first date"), check_date(end, "--end", "last date")
    cfg = with_runner(load(config, logs, workspace, shared), runner, dask_address)
    if sweep and (force or live != "last"):
        user_error("--force and --live do not apply to --sweep (each setting replays the range afresh in its own "
                   "scratch workspace and never goes live)")
    check_logs(cfg)
    if not dry_run:
        writable_workspace(cfg)
    from tasks.operate.backfill_plan import BackfillError, plan_backfill, reach, typical_night_seconds
    from tasks.workspace import Workspace
    # A dry run creates nothing: the workspace is read where it is (an absent one has no history).
    ws = Workspace(Path(cfg.paths.workspace).expanduser().resolve()) if dry_run else Workspace.at(cfg.paths.workspace)
    if sweep:
        _sweep(cfg, ws, start, end, sweep, dry_run, verbose)
        return
    try:
        plan = plan_backfill(ws, cfg, start, end, force)
    except BackfillError as exc:
        user_error(f"backfill: {exc}")
    to_run = [p for p in plan if p.action == "run"]
    if dry_run:
        ran, stop = reach(plan)
        title = f"backfill plan {start}..{end} (--live {live}): {len(to_run)} to run, {len(plan) - len(to_run)} to skip"
        if stop is not None:
            title += (f"; it stops at {stop.run_date} (no partition): {ran} night(s) run before it, "
                      f"{len(to_run) - ran - 1} after it are not reached")
        console.print(plan_table(plan, title))
        typical = typical_night_seconds(ws) if ws.ledger.exists() else None
        if ran and typical:
            console.print(f"estimated time: about {duration(typical * ran)} "
                          f"(median of earlier runs: {typical:.0f}s a night)")
        return
    if not to_run:
        console.print(f"nothing to do: all {len(plan)} date(s) in {start}..{end} are done (--force re-runs them)")
        return
    ran, stop = reach(plan)
    if stop is not None:
        # Known before any night starts: refuse in one line instead of running up to the gap and failing there.
        user_error(f"backfill: no dt={stop.run_date} partition in {cfg.paths.logs}, so the backfill would stop at "
                   f"{stop.run_date} after {ran} night(s). Run up to the day before it (--end), or set "
                   f"input.missing_partition = \"skip\" if days without logs are normal here (--dry-run shows the plan)")
    from tasks.lock import LockHeld, check_free
    try:
        check_free(ws.lock, cfg.runtime.lock_stale_seconds)
    except LockHeld as exc:
        err.print(f"[bold red]backfill refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    prefect_env(cfg.paths.workspace, verbose)
    from flows.backfill import BackfillStopped, backfill as backfill_flow
    try:
        with LedgerProgress(lambda: [ws], "backfill", len(to_run), "backfill", typical_night_seconds(ws)):
            out = backfill_flow(cfg=cfg, start=start, end=end, live=live, force=force)
    except BackfillStopped as exc:
        err.print(f"[bold red]backfill stopped[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    except LockHeld as exc:
        err.print(f"[bold red]backfill refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    except Exception as exc:  # noqa: BLE001
        fail(exc, "backfill", verbose)
    print_backfill(out)


def _sweep(cfg, ws, start: str, end: str, specs: list[str], dry_run: bool, verbose: bool) -> None:
    """``backfill --sweep``: replay ``start..end`` once per setting of the grid, each in a scratch workspace."""
    from tasks.operate import sweep as sweeps
    from tasks.operate.backfill_plan import BackfillError, date_range
    try:
        dates = date_range(start, end)
        grid = sweeps.expand_grid(cfg, sweeps.parse_specs(specs))
    except (BackfillError, sweeps.SweepError) as exc:
        user_error(f"sweep: {exc}")
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
        err.print(f"[bold red]sweep refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    except Exception as exc:  # noqa: BLE001
        fail(exc, "sweep", verbose)
    console.print(sweep_table(out["rows"], start, end))
    console.print(f"results: {out['results']}\nscratch workspaces: {out['root']}")
    if any(r["error"] for r in out["rows"]):
        raise typer.Exit(1)
