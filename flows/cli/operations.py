"""Commands that operate the workspace and its deployment: ``rollback``, ``approve`` and ``reject`` (a
person's review, ``gate.require_approval``), ``prune``, ``share`` and ``restore`` (the shared copy),
``serve`` (schedules on a Prefect server).

Every change to the workspace holds the workspace lock; after ``rollback`` and ``prune`` the shared copy,
if one is set, follows. Exit codes: 0 done; 1 refused (lock held, version unknown) or the copy failed;
2 a setting is wrong, or the shared copy belongs to another workspace.
"""

from __future__ import annotations

from contextlib import contextmanager
from pathlib import Path
from typing import Optional

import typer

from flows.cli.common import ConfigOpt, LogsOpt, SharedOpt, VerboseOpt, WorkspaceOpt, console, err, load, prefect_env
from flows.cli.preflight import check_date, check_logs, existing_workspace, user_error, writable_workspace


def rollback(to: str = typer.Option(..., "--to", help="Version id to make live again (see `tarewise versions`)."),
             reason: str = typer.Option("manual rollback", "--reason", help="Recorded in the ledger and pointer."),
             config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
             shared: Optional[str] = SharedOpt) -> None:
    """Make an earlier version live again (one atomic switch), recorded in the run ledger; then the
    shared copy, if one is set, follows."""
    cfg = load(config, None, workspace, shared)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.lock import LockHeld
    from tasks.operate.rollback import RollbackError, rollback as do_rollback
    try:
        out = do_rollback(ws, to, reason, cfg.runtime.timezone, cfg.runtime.lock_stale_seconds)
    except (RollbackError, LockHeld) as exc:
        err.print(f"[bold red]rollback refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    if out["run_id"] is None:
        console.print(f"{to} is already live; nothing changed")
        return
    if out["damaged_pointer"]:
        err.print(f"note: the damaged live pointer was replaced; its bytes are kept at {out['damaged_pointer']}",
                  highlight=False)
    if out["state_before"] == "held":
        err.print(f"note: {to} was held by the promotion gate when it was published (see `tarewise versions`)")
    console.print(f"live: {out['previous'] or 'none'} -> {out['live']} (ledger run {out['run_id']})", highlight=False)
    _share_after(cfg, f"rollback to {to} is done here")


def _reviewer(by: Optional[str]) -> str:
    if by:
        return by
    import getpass
    try:
        return getpass.getuser()
    except Exception:  # noqa: BLE001 - no login name in this environment
        return "unknown"


def approve(version: str = typer.Argument(..., help="Version id awaiting approval (`tarewise status` lists them)."),
            reason: str = typer.Option("approved", "--reason", help="Recorded in the ledger and the live pointer."),
            by: Optional[str] = typer.Option(None, "--by", help="Who approves (default: your login name)."),
            config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
            shared: Optional[str] = SharedOpt) -> None:
    """Approve a candidate the gate held awaiting approval (gate.require_approval): it becomes live (one
    atomic switch), recorded in the run ledger; then the shared copy, if one is set, follows."""
    cfg = load(config, None, workspace, shared)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.lock import LockHeld
    from tasks.operate.approval import ApprovalError, approve as do_approve
    from tasks.operate.rollback import RollbackError
    try:
        out = do_approve(ws, version, reason, _reviewer(by), cfg.runtime.timezone, cfg.runtime.lock_stale_seconds)
    except ApprovalError as exc:
        user_error(str(exc))
    except (RollbackError, LockHeld) as exc:
        err.print(f"[bold red]approve refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    console.print(f"approved: live {out['previous'] or 'none'} -> {out['live']} (ledger run {out['run_id']})",
                  highlight=False)
    _share_after(cfg, f"approval of {version} is done here")


def reject(version: str = typer.Argument(..., help="Version id awaiting approval (`tarewise status` lists them)."),
           reason: str = typer.Option(..., "--reason", help="Why: recorded in the run ledger."),
           by: Optional[str] = typer.Option(None, "--by", help="Who rejects (default: your login name)."),
           config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Turn down a candidate awaiting approval: it stays held and no longer awaits; recorded in the run
    ledger. The live version does not change."""
    cfg = load(config, None, workspace)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.lock import LockHeld
    from tasks.operate.approval import ApprovalError, reject as do_reject
    try:
        run_id = do_reject(ws, version, reason, _reviewer(by), cfg.runtime.timezone, cfg.runtime.lock_stale_seconds)
    except ApprovalError as exc:
        user_error(str(exc))
    except LockHeld as exc:
        err.print(f"[bold red]reject refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)
    console.print(f"rejected: {version} stays held (ledger run {run_id})", highlight=False)


def prune(as_of: Optional[str] = typer.Option(None, "--as-of", help="Reference date for the day-based limits "
                                              "(default: newest completed run date in the ledger)."),
          config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
          shared: Optional[str] = SharedOpt) -> None:
    """Apply the retention settings: old versions (never live or pinned), quarantine and metrics by days;
    then the shared copy, if one is set, follows."""
    if as_of is not None:
        as_of = check_date(as_of, "--as-of", "reference date")
    cfg = load(config, None, workspace, shared)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.lock import LockHeld, workspace_lock
    from tasks.operate.retention import apply_retention, default_as_of
    from tasks.publish.versions import VersionError
    try:
        with workspace_lock(ws.lock, "prune", cfg.runtime.lock_stale_seconds):
            result = apply_retention(ws, cfg.retention, as_of or default_as_of(ws, cfg.runtime.timezone))
    except (LockHeld, VersionError) as exc:   # a damaged live pointer: which version to protect is unknown
        err.print(f"[bold red]prune refused[/]: {exc}", highlight=False, soft_wrap=True)
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
        err.print(f"[bold red]{what} refused[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(2)
    except (SharedCopyError, LockHeld) as exc:
        err.print(f"[bold red]{what} failed[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(1)


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
    existing_workspace(cfg, config, workspace)
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


def restore(config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
            shared: Optional[str] = SharedOpt) -> None:
    """Fill the workspace from the shared copy: every partition, whole version and history it lacks,
    and the live pointer if it has none. Nothing local is overwritten. (A night on a workspace that
    has never run does this by itself.)"""
    cfg = load(config, None, workspace, shared)
    writable_workspace(cfg)
    from tasks.lock import workspace_lock
    from tasks.operate.shared_restore import restore as do_restore
    with _shared_copy_command(cfg, "restore") as (ws, target):
        with workspace_lock(ws.lock, "restore from the shared copy", cfg.runtime.lock_stale_seconds):
            console.print(do_restore(ws, target).summary(), highlight=False)


def serve(work_pool: Optional[str] = typer.Option(None, "--work-pool", help="Register the deployments on this "
                                                  "Prefect work pool (run `prefect worker start --pool NAME`) "
                                                  "instead of serving them from this process."),
          register_only: bool = typer.Option(False, "--register-only", help="Register (or update) the "
                                             "deployments and exit."),
          config: Optional[Path] = ConfigOpt, logs: Optional[str] = LogsOpt, workspace: Optional[str] = WorkspaceOpt,
          verbose: bool = VerboseOpt) -> None:
    """Register the nightly (cron) and backfill deployments and serve them; needs a Prefect server."""
    cfg = load(config, logs, workspace)
    check_logs(cfg)
    writable_workspace(cfg)
    prefect_env(cfg.paths.workspace, verbose)
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
        err.print(f"[bold red]config error[/]: {exc}", highlight=False, soft_wrap=True)
        raise typer.Exit(2)
    if work_pool or register_only:
        for d in deployments:
            dep_id = d.apply(work_pool_name=work_pool) if work_pool else d.apply()
            console.print(f"registered {d.flow_name}/{d.name} ({dep_id})", highlight=False)
        if work_pool:
            console.print(f"start a worker to run them: prefect worker start --pool {work_pool}")
        return
    from prefect import serve as prefect_serve

    from flows.deployments import catch_up_on_start
    for d in deployments:   # registered first, so a catch-up run can be started before serving
        d.apply()
    line = catch_up_on_start(cfg)
    if line:
        console.print(line, highlight=False, soft_wrap=True)
    console.print(f"serving nightly at '{cfg.runtime.schedule}' ({cfg.runtime.timezone}) and backfill; Ctrl-C "
                  "stops (stopping pauses both deployments and cancels a run in progress; run `tarewise serve` "
                  "again to resume, see README)", highlight=False)
    prefect_serve(*deployments)
