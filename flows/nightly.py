"""The nightly flow: ingest one day, fine-tune, evaluate, gate, publish, report. Orchestration only."""

from __future__ import annotations

import time

import pandas as pd
from prefect import flow, get_run_logger
from prefect.artifacts import create_markdown_artifact, create_table_artifact

from flows import run_guard, runners
from flows.alert_channels import prefect_channels
from flows.night_record import NightRecord, epoch_seconds, input_counts, training_counts
from tasks import allocators, failpoints, ledger, steps
from tasks.config import Config
from tasks.dates import parse_date, yesterday
from tasks.engine.checkpoint import Checkpoint
from tasks.evaluate.gate import decide
from tasks.evaluate.probe_plan import PLANS_DIR, uniform_heldout
from tasks.evaluate.segments import judged_segments
from tasks.ingest.logs import IngestResult
from tasks.ingest.partition import inputs_key
from tasks.monitor.night_report import measure_night, monitor_night
from tasks.operate.retention import apply_retention_logged
from tasks.operate.shared_copy import SharedCopyError
from tasks.publish import versions
from tasks.publish.manifest import build_manifest
from tasks.workspace import Workspace


@flow(name="tarewise-nightly")
def nightly(cfg: Config, run_date: str | None = None, kind: str = "nightly", make_live: bool = True,
            take_lock: bool = True, base_from: str | None = None, cold: bool = False, force: bool = False) -> dict:
    """One night; returns ``NightRecord.to_dict()`` (``flows/night_record.py``). ``make_live=False`` publishes without switching live (backfill's middle nights);
    ``take_lock=False`` when a parent flow (backfill) already holds the workspace lock; ``base_from``
    warm-starts from that version's chain instead of the live one (see ``versions.base_for_date``);
    ``cold`` starts from scratch (a damaged base is otherwise refused). A night already done with the same
    inputs is not run again (one line says so) unless ``force`` or ``cold``; see ``flows/run_guard.py`` for
    the lock wait, dead runs and signals."""
    allocators.return_freed_memory()     # freed window-sized buffers go back to the system (tasks/allocators.py)
    run_date = run_date or yesterday(cfg.runtime.timezone)
    parse_date(run_date)   # a malformed date is refused before the ledger records a night
    ws = Workspace.at(cfg.paths.workspace)
    if take_lock:
        with run_guard.locked_run(cfg, ws, f"{kind} run for {run_date}", kind, run_date), \
                run_guard.stop_signals(get_run_logger()):
            if cfg.paths.shared:   # a workspace that has never run starts from the shared copy
                steps.with_io_retries(steps.restore_shared, cfg)(cfg)
            return _night(cfg, ws, run_date, kind, make_live, base_from, cold, force)
    return _night(cfg, ws, run_date, kind, make_live, base_from, cold, force)


def nightly_for(cfg: Config, dask_address: str | None = None, **options):
    """The nightly flow with the config's task runner (``runtime.runner``) and flow timeout; ``options``
    are passed on to ``with_options`` (e.g. ``flow_run_name``). Every caller that runs nights from a config
    (CLI, backfill, sweep, deployments) goes through here. ``dask_address``: a cluster shared by several
    nights (``runners.shared_cluster``)."""
    return nightly.with_options(task_runner=runners.task_runner(cfg.runtime, dask_address),
                                timeout_seconds=cfg.runtime.flow_timeout_seconds, **options)


def _night(cfg: Config, ws: Workspace, run_date: str, kind: str, make_live: bool, base_from: str | None,
           cold: bool = False, force: bool = False) -> dict:
    key = inputs_key(cfg.paths.logs, run_date, cfg)
    same = None if (force or cold or key is None) else unchanged_night(ws, run_date, kind, key)
    if same is not None:
        get_run_logger().warning(same.message)
        return same.to_dict()
    night = _work(cfg, ws, run_date, kind, make_live, base_from, cold, key)
    if cfg.paths.shared and night.status != "unchanged":
        night.shared = push_to_shared(cfg, night.outcome())
    return night.to_dict()


def unchanged_night(ws: Workspace, run_date: str, kind: str, key: str) -> NightRecord | None:
    """The night, status ``unchanged``, when its latest done run had these same inputs (no ledger row is
    added: nothing ran); else None."""
    prev = ledger.latest_done(ws, run_date)
    if prev is None or prev.get("inputs_key") != key:
        return None
    out = NightRecord(kind, run_date, status="unchanged", version_id=prev["version_id"], state=prev["state"])
    out.message = (f"night {run_date} already done with the same inputs (run {prev['run_id']}, version "
                   f"{prev['version_id']}); not run again. Changed input files or config re-run it; so does --force")
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


def _work(cfg: Config, ws: Workspace, run_date: str, kind: str, make_live: bool, base_from: str | None,
          cold: bool = False, key: str | None = None) -> NightRecord:
    """The night's steps. ``ledger.recorded`` keeps the ledger row (done, skipped, or failed with the
    exception) and each ``night.stage`` its duration."""
    log = get_run_logger()
    for name in versions.clean_staging(ws):
        log.warning("removed half-written version %s left by an interrupted run", name)
    record = NightRecord(kind, run_date, flow_run_id=run_guard.flow_run_id(), inputs_key=key)
    with ledger.recorded(ws, record) as night:
        run_guard.watch(night)
        with night.stage("ingest"):
            ingested = _ingest(cfg, run_date)
            night.counts.update(input_counts(ingested))
        if ingested.no_valid_rows:   # an empty day is said as such, never a normal-looking night
            night.skip(f"empty day: {ingested.summary()}; nothing trained or published")
            log.warning(night.message)
            run_guard.send_alert(cfg, ws, "empty_day", run_date, night.message, kind, metric="rows_valid")
            return night
        with night.stage("window"):
            window = steps.with_io_retries(steps.read_window, cfg)(cfg, run_date)
            if len(window) < cfg.runtime.min_ratings_to_train:
                night.skip(f"{len(window)} ratings in the window (< runtime.min_ratings_to_train="
                           f"{cfg.runtime.min_ratings_to_train}); nothing trained or published")
                log.warning(night.message)
                return night
            base_id, base, base_shadow = steps.with_io_retries(steps.load_base, cfg)(cfg, run_date, base_from, cold)
        with night.stage("train"):
            trained = steps.train(cfg, window, base, base_shadow)
        allocators.trim()    # training's many small freed tensors: out of the heap before the next peaks
        cand, shadow = trained.candidate, trained.shadow.checkpoint if trained.shadow else None
        with night.stage("evaluate"):
            # segments from the window without the held-out probe rows they are judged on (segments.py)
            segments = judged_segments(window, cand.probe_heldout, cfg.evaluate.skew_margin)
            # probe ratings of members a probe plan picked are not judged on (tasks/evaluate/probe_plan.py)
            heldout, _ = uniform_heldout(cand.probe_heldout, window, ws.root / PLANS_DIR)
            night.evaluation = steps.evaluate(cfg, heldout, segments, cand.checkpoint, shadow, base)
        with night.stage("anchor"):   # the strongest recent version on the same held-out ratings (gate rule 3)
            night.evaluation = steps.compare_with_anchor(cfg, run_date, night.evaluation, heldout,
                                                         cand.checkpoint, base_id, base)
        with night.stage("report"):   # tonight's metrics and alert rules come first: the gate may hold on an alert
            version_id = versions.new_version_id(ws, run_date)
            measured = measure_night(cfg, ws, run_date, window, ingested, trained, night.evaluation, base=base,
                                     base_id=base_id, version_id=version_id)
        night.gate = decide(night.evaluation, cfg.gate, measured.alerts_for_gate())
        log.info("gate: %s (%s)", "promote" if night.gate.promote else "hold", night.gate.reason)
        allocators.trim()
        with night.stage("predict"):
            preds = _predict(cfg, cand.checkpoint, window)
        with night.stage("publish"):
            night.counts.update(training_counts(window, cand, preds))
            manifest = build_manifest(cfg, run_date, kind, base_id, ingested.files,
                                      sorted(map(str, window["dt"].unique())), night.counts,
                                      night.evaluation, night.gate, cand.rounds, cand.notes, cand.checkpoint.method)
            state = steps.with_io_retries(steps.publish_version, cfg)(
                cfg, version_id, cand.checkpoint, shadow, preds, manifest, make_live=night.gate.promote and make_live)
        night.done(version_id, state, message=night.gate.reason)   # published: nothing below may fail the night
        ledger.save(ws, night)
        failpoints.hit("night:published")
        night.epoch_seconds = epoch_seconds(trained)
        with night.stage("report"):
            try:
                monitored = monitor_night(ws, cfg, measured, kind, prefect_channels(cfg),
                                          outcome={"state": state, "gate": night.gate.reason})
                night.alerts = monitored.alert_lines()
                _artifacts(night, monitored.markdown)
            except Exception as exc:  # noqa: BLE001 - the version is published; say what is missing and how to redo it
                night.message += (f"; report warning: the report or alerts failed after publishing "
                                  f"({type(exc).__name__}: {exc}); fix that, then re-render with "
                                  f"`tarewise report --date {run_date}`")
                log.warning("night %s is %s as %s, but %s", run_date, state, version_id, night.message)
    if kind == "nightly":  # a backfill applies retention once, after its last night
        apply_retention_logged(cfg, ws, run_date, log)
    return night


def _ingest(cfg: Config, run_date: str) -> IngestResult:
    """List the night's partition, read and row-check its files side by side on the task runner (they are
    independent), combine them, then quarantine rejected rows and store the valid ones."""
    listing = steps.with_io_retries(steps.list_partition, cfg)(cfg, run_date)
    reads = [steps.with_io_retries(steps.read_log_file, cfg).submit(cfg, run_date, path) for path in listing.paths]
    result = steps.validate_partition(cfg, listing, [f.result() for f in reads])
    steps.with_io_retries(steps.quarantine_and_store, cfg)(cfg, run_date, result)
    return result


def _predict(cfg: Config, ckpt: Checkpoint, window: pd.DataFrame) -> pd.DataFrame:
    """Top-N lists in shards of whole scoring blocks, side by side on the task runner; joined in plan order."""
    shards = steps.plan_scoring(cfg, ckpt, window, 2 * runners.workers(cfg.runtime))
    scored = [steps.score_users.submit(cfg, ckpt, shard) for shard in shards]
    return steps.assemble_predictions(ckpt, [f.result() for f in scored])


def _artifacts(night: NightRecord, markdown: str) -> None:
    """The held-out errors as a Prefect table artifact and the night's summary as a Markdown one."""
    rows = [{"model": name, "n": e.n, "mae": round(e.mae, 4), "mae_ci": f"[{e.mae_lo:.4f}, {e.mae_hi:.4f}]",
             "rmse": round(e.rmse, 4)} for name, e in night.evaluation.models().items() if e]
    create_table_artifact(key="tarewise-heldout-errors", table=rows,
                          description=f"Held-out probe errors, run {night.run_date}")
    create_markdown_artifact(key="tarewise-night", markdown=markdown, description=f"tarewise night {night.run_date}")
