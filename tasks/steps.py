"""Prefect task wrappers around the plain units of work in ``tasks/``.

This is the only module in ``tasks/`` that decorates with Prefect. Each wrapper adds what Prefect is for:
retries with backoff on transient I/O errors (never on bad data), run logging, and no input hashing of
large frames (``NO_CACHE``: the workspace is the durable state; caching a DataFrame-keyed result would
cost a hash of every row and duplicate the store).
"""

from __future__ import annotations

import dataclasses

import pandas as pd
from prefect import get_run_logger, task
from prefect.cache_policies import NO_CACHE

from tasks.config import Config
from tasks.engine.checkpoint import Checkpoint
from tasks.evaluate import anchor, evaluation
from tasks.ingest import logs as ingest
from tasks.ingest import store
from tasks.operate import shared_copy, shared_restore
from tasks.publish import predictions
from tasks.publish import versions
from tasks.train import training
from tasks.workspace import Workspace


def transient_only(task_, task_run, state) -> bool:
    """Retry condition (Prefect's ``retry_condition_fn``): retry OS-level I/O failures (``OSError``:
    connection resets, timeouts, a file briefly missing); bad data (``ValueError``, including errors that
    are both, such as ``io.UnsupportedOperation``) or a code error fails at once."""
    exc = state.data if isinstance(getattr(state, "data", None), BaseException) else None
    if exc is None:
        try:
            state.result()
        except BaseException as e:  # noqa: BLE001 - we only classify it
            exc = e
    return isinstance(exc, OSError) and not isinstance(exc, ValueError)


IO = dict(retries=2, retry_delay_seconds=[1, 5], retry_condition_fn=transient_only, cache_policy=NO_CACHE)
COMPUTE = dict(cache_policy=NO_CACHE)


def with_io_retries(step, cfg: Config):
    """An I/O task with the configured retry count (``runtime.io_retries``; backoff delays as declared)."""
    return step.with_options(retries=cfg.runtime.io_retries)


@task(name="list-partition", **IO)
def list_partition(cfg: Config, run_date: str) -> ingest.PartitionListing:
    listing = ingest.list_partition(cfg.paths.logs, run_date, cfg)
    if listing.missing:
        get_run_logger().warning("partition for %s is missing; skipped (input.missing_partition = 'skip')",
                                 run_date)
    return listing


@task(name="read-log-file", **IO)
def read_log_file(cfg: Config, run_date: str, path: str) -> ingest.CheckedFile:
    return ingest.read_log_file(cfg.paths.logs, path, run_date, cfg)


@task(name="validate-partition", **COMPUTE)
def validate_partition(cfg: Config, listing: ingest.PartitionListing,
                       checked: list[ingest.CheckedFile]) -> ingest.IngestResult:
    result = ingest.combine_files(listing, checked, cfg)
    get_run_logger().info("read %d rows from %d file(s): %d valid, %d rejected", result.rows_read,
                          len(result.files), result.rows_valid, len(result.rejected))
    return result


@task(name="quarantine-and-store", **IO)
def quarantine_and_store(cfg: Config, run_date: str, result: ingest.IngestResult) -> None:
    ws = Workspace.at(cfg.paths.workspace)
    # Quarantine first: rejected rows are kept even when the share check below fails the run.
    ingest.write_quarantine(ws, run_date, result.rejected)
    ingest.check_rejected_share(result, cfg)
    if not result.missing:
        store.write_partition(ws, run_date, result.valid_table)


@task(name="read-window", **IO)
def read_window(cfg: Config, run_date: str) -> pd.DataFrame:
    # Ids as categoricals (integer codes + sorted distinct texts): strings only at the edges. No event
    # times: they choose the latest event per key inside the read, and no later stage reads them.
    return store.read_window(Workspace.at(cfg.paths.workspace), run_date, cfg.window.days, categorical=True,
                             times=False)


@task(name="load-base", **IO)
def load_base(cfg: Config, run_date: str, base_from: str | None = None, cold: bool = False
              ) -> tuple[str | None, Checkpoint | None, Checkpoint | None]:
    """``base_from``: start the base walk from this version instead of the live one (backfill chains).
    Refuses a damaged base (``versions.BaseDamaged``, not retried); ``cold``: start from scratch on purpose."""
    if cold:
        get_run_logger().warning("starting cold on request: no warm start, the gate compares with the shadow model")
    return versions.load_base(Workspace.at(cfg.paths.workspace), run_date, head=base_from, cold=cold)


@task(name="train", **COMPUTE)
def train(cfg: Config, window: pd.DataFrame, base: Checkpoint | None,
          base_shadow: Checkpoint | None) -> training.TrainedNight:
    log = get_run_logger()
    night = training.train_night(window, cfg, base, base_shadow, log=log.debug)
    c = night.candidate
    log.info("candidate (%s): %d rounds, best %d, %d new users, %d new items", c.checkpoint.method,
             len(c.rounds), c.best_epoch, c.new_users, c.new_items)
    for note in c.notes:
        log.warning("engine: %s", note)
    return night


@task(name="evaluate", **COMPUTE)
def evaluate(cfg: Config, heldout: pd.DataFrame, segments: pd.Series, candidate: Checkpoint,
             shadow: Checkpoint | None, live: Checkpoint | None) -> evaluation.Evaluation:
    return evaluation.evaluate_models(heldout, segments, candidate, shadow, live, cfg.evaluate, cfg.model.seed)


@task(name="compare-with-anchor", **COMPUTE)
def compare_with_anchor(cfg: Config, run_date: str, evaluated: evaluation.Evaluation, heldout: pd.DataFrame,
                        candidate: Checkpoint, base_id: str | None, base: Checkpoint | None
                        ) -> evaluation.Evaluation:
    """``evaluated`` with its ``anchor``: the strongest of the recent versions (``gate.anchor_nights``)
    re-scored on tonight's held-out probe ratings (``evaluate/anchor.py``); versions that cannot serve
    are logged and skipped."""
    ws = Workspace.at(cfg.paths.workspace)
    priors, skipped = versions.anchor_versions(ws, run_date, cfg.gate.anchor_nights,
                                               loaded={base_id: base} if base_id and base is not None else None)
    for line in skipped:
        get_run_logger().warning("not a possible anchor tonight: %s", line)
    compared = anchor.compare_with_anchor(heldout, candidate, priors, cfg.gate.min_heldout, base_id, base, skipped)
    return dataclasses.replace(evaluated, anchor=compared)


@task(name="plan-scoring", **COMPUTE)
def plan_scoring(cfg: Config, ckpt: Checkpoint, window: pd.DataFrame, shards: int) -> list[predictions.ScoringShard]:
    return predictions.plan_shards(ckpt, window, cfg.debias.memory_budget_mb, shards)


@task(name="score-users", **COMPUTE)
def score_users(cfg: Config, ckpt: Checkpoint, shard: predictions.ScoringShard) -> tuple:
    return predictions.score_shard(ckpt, shard, cfg.publish.top_n, cfg.debias.memory_budget_mb)


@task(name="assemble-predictions", **COMPUTE)
def assemble_predictions(ckpt: Checkpoint, parts: list[tuple]) -> pd.DataFrame:
    return predictions.assemble(ckpt, parts)


@task(name="publish-version", **IO)
def publish_version(cfg: Config, version_id: str, candidate: Checkpoint, shadow: Checkpoint | None,
                    preds: pd.DataFrame, manifest: dict, make_live: bool) -> str:
    ws = Workspace.at(cfg.paths.workspace)
    versions.publish(ws, version_id, candidate, preds, manifest, shadow=shadow)
    if make_live:
        versions.set_live(ws, version_id, reason=f"promoted by gate on run {manifest['run_date']}")
        return "live"
    return "candidate" if manifest["gate"]["promote"] else "held"


@task(name="restore-from-shared-copy", **IO)
def restore_shared(cfg: Config) -> shared_restore.RestoreResult | None:
    """A workspace that has never run starts from the shared copy (``paths.shared``); else nothing."""
    ws = Workspace.at(cfg.paths.workspace)
    if not shared_restore.is_new(ws):
        return None
    result = shared_restore.restore(ws, shared_copy.SharedCopy.at(cfg.paths.shared, ws))
    get_run_logger().info(result.summary())
    return result


@task(name="push-to-shared-copy", **IO)
def push_shared(cfg: Config) -> shared_copy.PushResult:
    """Bring the shared copy (``paths.shared``) up to date with the workspace (live pointer last)."""
    ws = Workspace.at(cfg.paths.workspace)
    result = shared_copy.push(ws, shared_copy.SharedCopy.at(cfg.paths.shared, ws))
    get_run_logger().info(result.summary())
    return result
