"""Retention: keep the workspace from growing without bound, never touching what is served.

Three things age out (``[retention]`` in the config):

- versions: all but the ``keep_versions`` most recently published are deleted; the live version, its
  base (needed to re-run the live version's date identically), the gate's anchor of the newest night
  and ``pinned`` ones never are
  (``versions.prune``);
- quarantine partitions (``quarantine/dt=D``) with ``D`` more than ``quarantine_days`` before ``as_of``;
- metric rows with a run date more than ``metrics_days`` before ``as_of``.

Ages are counted in data time, from ``as_of`` (the night being run, or the newest completed run date
in the run ledger), not from the wall clock: replaying two-year-old logs in a backfill must not delete
the quarantine and metrics it has just written, and the same history prunes the same way every time.

Plain functions; the nightly flow calls :func:`apply_retention_logged` after a completed night, a
backfill once after its last night, ``tarewise prune`` on demand (all under the workspace lock).
"""

from __future__ import annotations

import shutil
from dataclasses import asdict, dataclass, field
from datetime import date, datetime
from zoneinfo import ZoneInfo

from tasks.config import Config, RetentionConfig
from tasks.dates import shift
from tasks.ledger import latest_by_date
from tasks.monitor.metrics_store import prune_metrics
from tasks.publish.versions import prune
from tasks.workspace import Workspace


@dataclass
class RetentionResult:
    """What one retention pass removed. ``as_of``: the reference date (YYYY-MM-DD)."""
    as_of: str
    versions: list[str] = field(default_factory=list)
    quarantine_dates: list[str] = field(default_factory=list)
    metrics_rows: int = 0

    def removed_anything(self) -> bool:
        return bool(self.versions or self.quarantine_dates or self.metrics_rows)

    def summary(self) -> str:
        return (f"retention as of {self.as_of}: {len(self.versions)} version(s) deleted"
                f"{' (' + ', '.join(self.versions) + ')' if self.versions else ''}, "
                f"{len(self.quarantine_dates)} quarantine partition(s), {self.metrics_rows} metric row(s)")

    def to_dict(self) -> dict:
        return asdict(self)


def cutoff(as_of: str, days: int) -> str:
    """First date kept: dates strictly before ``as_of - days`` age out (YYYY-MM-DD)."""
    return shift(as_of, -days)


def default_as_of(ws: Workspace, timezone: str) -> str:
    """The newest run date with a completed nightly or backfill run; today (in ``timezone``) when the
    ledger has none."""
    latest = latest_by_date(ws)
    done = latest[latest["status"].isin(["done", "skipped"])] if len(latest) else latest
    if len(done):
        return str(done.index.max())
    return datetime.now(ZoneInfo(timezone)).date().isoformat()


def prune_quarantine(ws: Workspace, before: str) -> list[str]:
    """Delete ``quarantine/dt=D`` partitions with ``D < before``; return the dates removed."""
    if not ws.quarantine.is_dir():
        return []
    gone = []
    for part in sorted(ws.quarantine.iterdir()):
        name = part.name
        if not (part.is_dir() and name.startswith("dt=")):
            continue
        try:
            day = date.fromisoformat(name[3:]).isoformat()
        except ValueError:
            continue  # not ours: leave it
        if day < before:
            # Rename first so a crash mid-delete leaves a hidden folder readers skip, not half a partition.
            trash = ws.quarantine / f".trash-{name}"
            part.rename(trash)
            shutil.rmtree(trash, ignore_errors=True)
            gone.append(day)
    for left in ws.quarantine.glob(".trash-*"):
        shutil.rmtree(left, ignore_errors=True)
    return gone


def apply_retention(ws: Workspace, cfg: RetentionConfig, as_of: str) -> RetentionResult:
    """One retention pass (see module docstring). Call while holding the workspace lock."""
    date.fromisoformat(as_of)  # a bad reference date must fail before anything is deleted
    result = RetentionResult(as_of=as_of)
    result.versions = prune(ws, cfg.keep_versions, tuple(cfg.pinned))
    result.quarantine_dates = prune_quarantine(ws, cutoff(as_of, cfg.quarantine_days))
    result.metrics_rows = prune_metrics(ws, cutoff(as_of, cfg.metrics_days))
    return result


def apply_retention_logged(cfg: Config, ws: Workspace, as_of: str, log) -> RetentionResult | None:
    """:func:`apply_retention` for the end of a run: the run's own work is already recorded, so a
    retention failure is logged as a warning and never fails the run (the next run retries it)."""
    try:
        result = apply_retention(ws, cfg.retention, as_of)
    except Exception as exc:  # noqa: BLE001 - see docstring
        log.warning("retention skipped after this run: %s: %s", type(exc).__name__, exc)
        return None
    if result.removed_anything():
        log.info("%s", result.summary())
    return result
