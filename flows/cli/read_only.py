"""Commands that look at the workspace and change nothing in it: ``versions``, ``status``, ``report``
(re-renders a night's report from stored metrics) and ``score`` (writes only its ``--out`` file).

None of them runs a flow, so none imports Prefect (they take a few seconds, mostly loading torch). None of them
creates a workspace: with none at the configured path they say which paths were tried (exit 2).
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from flows.cli.common import ConfigOpt, SharedOpt, WorkspaceOpt, console, err, fail, load
from flows.cli.preflight import existing_workspace, stored_night, user_error
from flows.cli.tables import alerts_table, runs_table, versions_table


def score(pairs: Path = typer.Option(..., "--pairs", help="Parquet with user_id, item_id columns."),
          out: Path = typer.Option(..., "--out", help="Where to write the scored Parquet."),
          version: Optional[str] = typer.Option(None, "--version", help="Version id (default: live)."),
          config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Score arbitrary (user_id, item_id) pairs; unknown ids get a fallback score and a flag."""
    cfg = load(config, None, workspace)
    existing_workspace(cfg, config, workspace)
    if not pairs.is_file():
        user_error(f"--pairs: no file at {pairs}")
    from tasks.publish.scoring_io import score_pairs
    try:
        n, used, fallbacks = score_pairs(cfg, pairs, out, version)
    except Exception as exc:  # noqa: BLE001
        fail(exc, "score")
    console.print(f"scored {n} pairs with version {used} -> {out} ({fallbacks} with a fallback score)")


def versions_cmd(config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """List versions with state, run date, held-out MAE and gate reason."""
    cfg = load(config, None, workspace)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.publish.versions import PointerDamaged, list_versions, read_pointer
    try:
        read_pointer(ws)
    except PointerDamaged as exc:
        err.print(f"[bold red]live version unknown[/]: {exc}", highlight=False, soft_wrap=True)
    from tasks.operate.approval import awaiting, reviews
    t, reasons = versions_table(list_versions(ws), f"versions in {ws.root}", reviews(ws),
                                {m["version_id"] for m in awaiting(ws)})
    console.print(t)
    for line in reasons:
        console.print(line, highlight=False, soft_wrap=True, markup=False)


def report(date: Optional[str] = typer.Option(None, "--date", "-d", help="Night to render (default: latest)."),
           config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Re-render a night's HTML report and its JSON twin from stored metrics."""
    cfg = load(config, None, workspace)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.monitor.metrics_store import read_metrics
    stored = sorted({str(d) for d in read_metrics(ws)["run_date"]})
    date = stored_night(date, stored, "nights with stored metrics", f"no metrics stored for {{date}} in {ws.metrics}",
                        f"no stored metrics in {ws.metrics}; run a night first")
    from tasks.monitor.report import render_report
    try:
        html, js = render_report(ws, date, cfg)
    except Exception as exc:  # noqa: BLE001
        fail(exc, "report")
    console.print(f"report: {html}\njson:   {js}")


def status(runs: int = typer.Option(10, "--runs", help="How many ledger rows to show."),
           days: int = typer.Option(7, "--days", help="Alerts of this many nights up to the newest run."),
           config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt,
           shared: Optional[str] = SharedOpt) -> None:
    """Live version, shared copy, lock, last runs from the ledger, recent alerts, and what is damaged or left
    over in the workspace with the fix for each. Exits 1 when a problem needs someone to act."""
    cfg = load(config, None, workspace, shared)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.operate.doctor import PROBLEM
    from tasks.operate.status import status as workspace_status
    from tasks.dates import today
    from tasks.operate.catch_up import night_findings

    def paused():   # needs a Prefect server; Prefect is imported only when one is named
        import os
        if not os.environ.get("PREFECT_API_URL"):
            return []
        from flows.deployments import paused_deployments
        return paused_deployments()

    checks = (lambda: night_findings(ws, today(cfg.runtime.timezone)), paused)
    s = workspace_status(ws, cfg.runtime.timezone, cfg.runtime.lock_stale_seconds, runs, days, extra_checks=checks)
    console.print(f"workspace: {s['workspace']}", highlight=False)
    lv = s["live"]
    if lv == "unknown":
        console.print("live: [bold red]unknown[/] (see the problems below)")
    elif lv:
        mae = f", held-out MAE {lv['mae']:.4f} (n={lv['heldout']})" if lv.get("mae") is not None else ""
        console.print(f"live: [bold]{lv['version_id']}[/] (night {lv['run_date']}, {lv['method']}{mae}); "
                      f"since {lv['since']}: {lv['reason']}", highlight=False)
    else:
        console.print("live: none yet")
    if cfg.paths.shared:
        from tasks.operate.shared_copy import SharedCopyError, pending_files
        try:
            n = pending_files(ws, cfg.paths.shared)
            console.print(f"shared copy: {cfg.paths.shared}: " + (f"{n} file(s) not copied yet (`tarewise share`)"
                                                                 if n else "up to date"), highlight=False)
        except (SharedCopyError, OSError, ValueError) as exc:
            console.print(f"shared copy: {exc}", highlight=False)
    lk = s["lock"]
    if lk:
        state = "stale (will be taken over)" if lk["stale"] else "held"
        console.print(f"lock: {state} by {lk.get('what', '?')} (pid {lk.get('pid')} on {lk.get('host')})",
                      highlight=False)
    else:
        console.print("lock: free")
    if "runs" in s["skipped"]:
        console.print(f"runs: could not be read ({s['skipped']['runs']})", highlight=False)
    else:
        console.print(runs_table(s["runs"]))
    for a in s["awaiting"]:
        mae = f", held-out MAE {a['mae']:.4f}" if a.get("mae") is not None else ""
        base = f" vs {a['compared_to']} {a['baseline_mae']:.4f}" if a.get("baseline_mae") is not None else ""
        console.print(f"[bold yellow]awaiting approval[/]: {a['version_id']} (night {a['run_date']}{mae}{base})\n"
                      f"  approve: tarewise approve {a['version_id']}   reject: tarewise reject {a['version_id']} "
                      "--reason ...", highlight=False, soft_wrap=True)
    if "alerts" in s["skipped"]:
        console.print(f"alerts: could not be read ({s['skipped']['alerts']})", highlight=False)
    elif not s["alerts"]:
        console.print(f"alerts: none in the {s['days']} nights up to {s['as_of']}")
    else:
        console.print(alerts_table(s["alerts"], s["days"], s["as_of"]))
    findings = s["findings"]
    if not findings:
        console.print("workspace check: no problems found")
        return
    for f in findings:
        label = "[bold red]problem[/]" if f.severity == PROBLEM else "[yellow]note[/]"
        console.print(f"{label}: {f.what}\n  fix: {f.fix}", highlight=False, soft_wrap=True)
    if any(f.severity == PROBLEM for f in findings):
        raise typer.Exit(1)
