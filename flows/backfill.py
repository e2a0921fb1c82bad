"""Backfill and sweep flows: replay history night by night in one process. Orchestration only.

One parent flow runs every date as a child ``nightly`` flow (Prefect's local mode costs seconds per
process, so never one process per date). The parent holds the workspace lock for the whole range and
the children run with ``take_lock=False``. What runs, what is skipped, which version each night starts
from and which night may go live is decided from the run ledger (``tasks/operate/backfill_plan.py``), so a
resumed backfill makes the same choices as an uninterrupted one.
"""

from __future__ import annotations

import time
from typing import Literal

from prefect import flow, get_run_logger

from flows import run_guard, runners
from flows.nightly import nightly_for, push_to_shared
from tasks import failpoints, steps
from tasks.config import Config
from tasks.lock import workspace_lock
from tasks.operate import sweep as sweeps
from tasks.operate.backfill_plan import chain_head, date_range, make_live_for, plan_backfill
from tasks.operate.retention import apply_retention_logged, default_as_of
from tasks.publish.versions import live_version
from tasks.workspace import Workspace


class BackfillStopped(RuntimeError):
    """A night failed; the backfill stopped there. Earlier dates stay done; re-running resumes."""


def _night_row(out: dict, seconds: float) -> dict:
    """One backfill night for the summary, from the ``nightly`` flow's result (``NightRecord.to_dict``)."""
    e = (out["evaluation"] or {}).get("candidate") or {}
    return {"run_date": out["run_date"], "status": out["status"], "version_id": out["version_id"],
            "state": out["state"], "seconds": round(seconds, 2), "mae": e.get("mae"), "heldout": e.get("n"),
            "message": out["message"]}


@flow(name="tarewise-backfill")
def backfill(cfg: Config, start: str, end: str, live: Literal["last", "each"] = "last",
             force: bool = False) -> dict:
    """Replay ``start..end`` (inclusive) night by night; see ``tasks/operate/backfill_plan.py`` for the rules.

    Returns ``{"start", "end", "live_mode", "nights": [per run night], "skipped": [plan rows],
    "live_version", "retention"}``. Raises :class:`BackfillStopped` naming the date and cause when a
    night fails.
    """
    log = get_run_logger()
    ws = Workspace.at(cfg.paths.workspace)
    dates = date_range(start, end)
    with run_guard.locked_run(cfg, ws, f"backfill {start}..{end}", "backfill", start), \
            run_guard.stop_signals(log), runners.shared_cluster(cfg.runtime) as cluster:
        run_night = nightly_for(cfg, dask_address=cluster)
        if cfg.paths.shared:   # a workspace that has never run starts from the shared copy
            steps.with_io_retries(steps.restore_shared, cfg)(cfg)
        plan = plan_backfill(ws, cfg, start, end, force)
        skipped = [p.to_dict() for p in plan if p.action == "skip"]
        for p in skipped:
            log.info("%s: skipped, %s", p["run_date"], p["reason"])
        nights: list[dict] = []
        for p in (p for p in plan if p.action == "run"):
            base_from = chain_head(ws, start, p.run_date) if live == "last" else None
            go_live = make_live_for(ws, live, p.run_date, dates[-1])
            t0 = time.perf_counter()
            try:
                out = run_night(cfg=cfg, run_date=p.run_date, kind="backfill", make_live=go_live,
                                take_lock=False, base_from=base_from, force=force)
            except Exception as exc:  # noqa: BLE001 - any failure stops the range the same way
                done = [n["run_date"] for n in nights]
                raise BackfillStopped(
                    f"backfill stopped at {p.run_date}: {type(exc).__name__}: {exc}\n"
                    f"{len(done)} night(s) before it finished in this run"
                    f"{' (' + done[0] + '..' + done[-1] + ')' if done else ''} and stay done; "
                    f"fix the cause and run the same backfill again to resume from {p.run_date}.") from exc
            nights.append(_night_row(out, time.perf_counter() - t0))
            log.info("%s: %s %s (%s)", p.run_date, out["status"], out.get("version_id") or "", out.get("state") or "")
            failpoints.hit("backfill:date-done")
            if run_guard.stop_requested():
                raise BackfillStopped(f"backfill stopped by {run_guard.stop_requested()} after {p.run_date} was done; "
                                      "run the same backfill again to resume")
        retention = apply_retention_logged(cfg, ws, default_as_of(ws, cfg.runtime.timezone), log)
        if cfg.paths.shared:
            push_to_shared(cfg, f"backfill {start}..{end} is done here")
        return {"start": start, "end": end, "live_mode": live, "nights": nights, "skipped": skipped,
                "live_version": live_version(ws), "retention": retention.to_dict() if retention else None}


@flow(name="tarewise-sweep")
def sweep(cfg: Config, start: str, end: str, grid: list[dict]) -> dict:
    """Replay ``start..end`` once per setting in ``grid`` (dotted-key overrides), each in its own scratch
    workspace (``tasks/operate/sweep.py``); a failing setting is recorded and the others still run.

    Returns ``{"start", "end", "root", "rows": sweeps.summarise(...), "results": path}``.
    """
    log = get_run_logger()
    ws = Workspace.at(cfg.paths.workspace)
    dates = date_range(start, end)
    root = sweeps.sweep_root(ws, start, end)
    root.mkdir(parents=True, exist_ok=True)
    settings = []
    with workspace_lock(root / "lock", f"sweep {start}..{end}", cfg.runtime.lock_stale_seconds), \
            runners.shared_cluster(cfg.runtime) as cluster:
        for k, overrides in enumerate(grid):
            scratch = root / f"s{k:02d}"
            scfg = sweeps.scratch_config(cfg, overrides, scratch)
            sweeps.prepare_scratch(ws, scratch, start, scfg.window.days)
            sweeps.write_setting(scratch, start, end, overrides)
            run_night = nightly_for(scfg, dask_address=cluster, flow_run_name=f"sweep s{k:02d}")
            entry = {"label": sweeps.label(overrides), "overrides": overrides, "nights": [], "error": None}
            previous = None
            for d in dates:
                try:
                    out = run_night(cfg=scfg, run_date=d, kind="sweep", make_live=False, take_lock=True,
                                    base_from=previous)
                except Exception as exc:  # noqa: BLE001 - one bad setting must not sink the others
                    entry["error"] = f"{d}: {type(exc).__name__}: {exc}"[:500]
                    log.warning("sweep setting %s failed on %s: %s", entry["label"], d, exc)
                    break
                entry["nights"].append(out)
                previous = out.get("version_id") or previous
            settings.append(entry)
            log.info("sweep setting %s: %d night(s)%s", entry["label"], len(entry["nights"]),
                     f", failed {entry['error']}" if entry["error"] else "")
        rows = sweeps.summarise(settings)
        path = sweeps.write_results(root, start, end, rows)
    return {"start": start, "end": end, "root": str(root), "rows": rows, "results": str(path)}
