"""The nightly flow: ingest one day, fine-tune, evaluate, gate, publish, report. Orchestration only."""

from __future__ import annotations

import time

from prefect import flow, get_run_logger
from prefect.artifacts import create_markdown_artifact, create_table_artifact

from flows import runners
from tasks import ledger, steps
from tasks.config import Config
from tasks.dates import parse_date, yesterday
from tasks.evaluate.gate import decide
from tasks.lock import workspace_lock
from tasks.monitor.night_report import report_night
from tasks.monitor.skew_metrics import user_skew_segments
from tasks.operate.retention import apply_retention_logged
from tasks.operate.shared_copy import SharedCopyError
from tasks.publish import versions
from tasks.publish.manifest import build_manifest
from tasks.workspace import Workspace


class _Clock:
    """Stage durations for the ledger and manifest."""

    def __init__(self) -> None:
        self.durations: dict[str, float] = {}
        self._t = time.perf_counter()

    def lap(self, stage: str) -> None:
        now = time.perf_counter()
        self.durations[stage] = round(self.durations.get(stage, 0.0) + now - self._t, 3)
        self._t = now


@flow(name="tarewise-nightly")
def nightly(cfg: Config, run_date: str | None = None, kind: str = "nightly", make_live: bool = True,
            take_lock: bool = True, base_from: str | None = None) -> dict:
    """One night. ``make_live=False`` publishes without switching live (backfill's middle nights);
    ``take_lock=False`` when a parent flow (backfill) already holds the workspace lock; ``base_from``
    warm-starts from that version's chain instead of the live one (see ``versions.base_for_date``)."""
    run_date = run_date or yesterday(cfg.runtime.timezone)
    parse_date(run_date)   # a malformed date is refused before the ledger records a night
    ws = Workspace.at(cfg.paths.workspace)
    if take_lock:
        with workspace_lock(ws.lock, f"{kind} run for {run_date}", cfg.runtime.lock_stale_seconds):
            if cfg.paths.shared:   # a workspace that has never run starts from the shared copy
                steps.with_io_retries(steps.restore_shared, cfg)(cfg)
            # Holding the lock, no other run of this workspace is alive: "running" rows are dead runs.
            for run_id in ledger.mark_interrupted(ws):
                get_run_logger().warning("run %s never finished (killed or crashed); marked interrupted", run_id)
            return _night(cfg, ws, run_date, kind, make_live, base_from)
    return _night(cfg, ws, run_date, kind, make_live, base_from)


def nightly_for(cfg: Config, dask_address: str | None = None, **options):
    """The nightly flow with the config's task runner (``runtime.runner``) and flow timeout; ``options``
    are passed on to ``with_options`` (e.g. ``flow_run_name``). Every caller that runs nights from a config
    (CLI, backfill, sweep, deployments) goes through here. ``dask_address``: a cluster shared by several
    nights (``runners.shared_cluster``)."""
    return nightly.with_options(task_runner=runners.task_runner(cfg.runtime, dask_address),
                                timeout_seconds=cfg.runtime.flow_timeout_seconds, **options)


def _night(cfg: Config, ws: Workspace, run_date: str, kind: str, make_live: bool, base_from: str | None) -> dict:
    out = _work(cfg, ws, run_date, kind, make_live, base_from)
    if cfg.paths.shared:
        out["shared"] = push_to_shared(cfg, f"night {run_date} is {out['status']} here"
                                       + (f" (version {out['version_id']}, {out['state']})"
                                          if out.get("version_id") else ""))
    return out


def push_to_shared(cfg: Config, done: str) -> dict:
    """Copy the workspace's news to ``paths.shared``; returns files, bytes and seconds. Runs after the
    ledger has recorded the night, so a failure here does not undo the night: the flow fails, saying
    what is done and how it catches up."""
    t0 = time.perf_counter()
    try:
        result = steps.with_io_retries(steps.push_shared, cfg)(cfg)
        return {"files": result.uploaded, "bytes": result.bytes, "removed": result.deleted,
                "seconds": round(time.perf_counter() - t0, 3)}
    except Exception as exc:  # noqa: BLE001 - re-raised with what is done and what is not
        raise SharedCopyError(f"{done}, but the shared copy {cfg.paths.shared} was not brought up to date "
                              f"({type(exc).__name__}: {exc}); it still serves its previous live version. "
                              "The next night, or `tarewise share`, catches up.") from exc


def _work(cfg: Config, ws: Workspace, run_date: str, kind: str, make_live: bool, base_from: str | None) -> dict:
    log = get_run_logger()
    for name in versions.clean_staging(ws):
        log.warning("removed half-written version %s left by an interrupted run", name)
    run_id = ledger.start_run(ws, kind, run_date)
    clock = _Clock()
    counts: dict = {}
    try:
        listing = steps.with_io_retries(steps.list_partition, cfg)(cfg, run_date)
        # Files of a partition are independent: read and row-checked side by side on the task runner.
        reads = [steps.with_io_retries(steps.read_log_file, cfg).submit(cfg, run_date, path) for path in listing.paths]
        result = steps.validate_partition(cfg, listing, [f.result() for f in reads])
        counts = {"rows_read": result.rows_read, "rows_ingested": result.rows_valid,
                  "rows_quarantined": len(result.rejected)}
        steps.with_io_retries(steps.quarantine_and_store, cfg)(cfg, run_date, result)
        clock.lap("ingest")
        window = steps.with_io_retries(steps.read_window, cfg)(cfg, run_date)
        if len(window) < cfg.runtime.min_ratings_to_train:
            message = (f"{len(window)} ratings in the window (< runtime.min_ratings_to_train="
                       f"{cfg.runtime.min_ratings_to_train}); nothing trained or published")
            log.warning(message)
            ledger.finish_run(ws, run_id, "skipped", rows_ingested=counts["rows_ingested"],
                              rows_quarantined=counts["rows_quarantined"], durations=clock.durations,
                              message=message)
            return {"run_date": run_date, "status": "skipped", "version_id": None, "message": message}
        base_id, base, base_shadow = steps.with_io_retries(steps.load_base, cfg)(cfg, run_date, base_from)
        clock.lap("window")
        night = steps.train(cfg, window, base, base_shadow)
        clock.lap("train")

        cand = night.candidate
        segments = user_skew_segments(window, cfg.evaluate.skew_margin)
        models = {"candidate": cand.checkpoint, "shadow": night.shadow.checkpoint if night.shadow else None,
                  "live": base}
        evaluation = steps.evaluate(cfg, cand.probe_heldout, segments, models)
        decision = decide(evaluation["candidate"], evaluation["live"], evaluation["shadow"], cfg.gate)
        log.info("gate: %s (%s)", "promote" if decision.promote else "hold", decision.reason)
        clock.lap("evaluate")

        # Top-N lists in shards of whole scoring blocks, side by side on the task runner; joined in plan order.
        shards = steps.plan_scoring(cfg, cand.checkpoint, window, 2 * runners.workers(cfg.runtime))
        scored = [steps.score_users.submit(cfg, cand.checkpoint, shard) for shard in shards]
        preds = steps.assemble_predictions(cand.checkpoint, [f.result() for f in scored])
        clock.lap("predict")
        version_id = versions.new_version_id(ws, run_date)
        counts.update(window_ratings=len(window), window_users=int(window["user_id"].nunique()),
                      window_items=int(window["item_id"].nunique()), new_users=cand.new_users,
                      new_items=cand.new_items, heldout_probe=len(cand.probe_heldout),
                      fit_probe=len(cand.probe_fit), predictions=len(preds))
        manifest = build_manifest(cfg, run_date, kind, base_id, result.files,
                                  sorted(window["dt"].astype(str).unique().tolist()), counts, evaluation,
                                  decision.to_dict(), cand.rounds, cand.notes, cand.checkpoint.method)
        state = steps.with_io_retries(steps.publish_version, cfg)(cfg, version_id, cand.checkpoint,
                                      night.shadow.checkpoint if night.shadow else None, preds, manifest,
                                      make_live=decision.promote and make_live)
        clock.lap("publish")

        summary = report_night(cfg, ws, run_date, window, result, night, evaluation, decision, base,
                               base_id, version_id, state, kind)
        clock.lap("report")
        _artifacts(run_date, version_id, state, decision, evaluation, summary)
        ledger.finish_run(ws, run_id, "done", version_id=version_id, state=state,
                          rows_ingested=counts["rows_ingested"], rows_quarantined=counts["rows_quarantined"],
                          durations=clock.durations, message=decision.reason)
        if kind == "nightly":  # a backfill applies retention once, after its last night
            apply_retention_logged(cfg, ws, run_date, log)
        return {"run_date": run_date, "status": "done", "version_id": version_id, "state": state,
                "gate": decision.to_dict(), "evaluation": evaluation, "durations": clock.durations,
                "counts": counts, "alerts": summary.get("alerts", []),
                "epoch_seconds": {"candidate": [r["seconds"] for r in cand.rounds],
                                  "shadow": [r["seconds"] for r in night.shadow.rounds] if night.shadow else []}}
    except BaseException as exc:
        ledger.finish_run(ws, run_id, "failed", rows_ingested=counts.get("rows_ingested"),
                          rows_quarantined=counts.get("rows_quarantined"), durations=clock.durations,
                          message=f"{type(exc).__name__}: {exc}"[:2000])
        raise


def _artifacts(run_date, version_id, state, decision, evaluation, summary) -> None:
    rows = []
    for name in ("candidate", "shadow", "live"):
        e = evaluation.get(name)
        if e:
            rows.append({"model": name, "n": e["n"], "mae": round(e["mae"], 4),
                         "mae_ci": f"[{e['mae_lo']:.4f}, {e['mae_hi']:.4f}]", "rmse": round(e["rmse"], 4)})
    create_table_artifact(key="tarewise-heldout-errors", table=rows,
                          description=f"Held-out probe errors, run {run_date}")
    create_markdown_artifact(key="tarewise-night", markdown=summary.get("markdown") or
                             f"# tarewise {run_date}\n\nversion `{version_id}` is **{state}**: {decision.reason}\n",
                             description=f"tarewise night {run_date}")
