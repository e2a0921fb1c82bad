"""What a backfill will do, decided from the run ledger: which dates run, which are skipped and why,
which version each night warm-starts from, and which night may switch the live version.

Plain functions over the ledger and versions; ``flows/backfill.py`` orchestrates. Every decision is a
function of what is recorded in the workspace, never of what happened earlier in the same process, so a
backfill resumed after a crash makes exactly the choices an uninterrupted one would have made.

Rules
- A date is skipped when its latest nightly or backfill run finished ``done`` or ``skipped`` (too
  little data, an empty day), unless ``force``, or unless its input files or config changed since it was
  done (the ledger's ``inputs_key``; rows written before that column existed count as unchanged).
  Failed or interrupted dates run again.
- ``live="each"``: every night may go live (the promotion gate decides), as nightly runs would have.
  ``live="last"``: only the range's last date may go live; the nights before publish without switching.
- A backfill never moves the live version back in time: a night whose date is before the live
  version's run date publishes without switching (re-filling old gaps must not replace a newer model).
- Base of a night (``live="last"``): the version of the latest ``done`` run of an earlier date in the
  range (the chain carries forward through versions that never went live); for the range's first
  night, or when no earlier date in the range produced a version, the nightly rule (walk back from the
  live version, ``versions.base_for_date``). ``live="each"`` always uses the nightly rule.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import pandas as pd

from tasks.config import Config
from tasks import dates
from tasks.dates import DateError, parse_date
from tasks.ingest.logs import IngestError, list_partition_dates
from tasks.ingest.partition import inputs_key
from tasks.ledger import latest_by_date
from tasks.lock import is_stale, read_lock
from tasks.publish.versions import live_version, read_manifest
from tasks.workspace import Workspace

LIVE_MODES = ("last", "each")
#: Longest range one backfill accepts (about 10 years); a typo in a year should not plan 300k nights.
MAX_NIGHTS = 3660


class BackfillError(ValueError):
    """A backfill request is malformed (dates, range, mode); the message says which part."""


@dataclass(frozen=True)
class PlannedNight:
    run_date: str
    action: str        # "run" | "skip"
    reason: str
    stops: bool = False    # a run the backfill cannot get past (no partition, input.missing_partition = "error")

    def to_dict(self) -> dict:
        return asdict(self)


def date_range(start: str, end: str) -> list[str]:
    """Every calendar date from ``start`` to ``end`` inclusive (YYYY-MM-DD)."""
    try:
        a, b = parse_date(start, "--start"), parse_date(end, "--end")
    except DateError as exc:
        raise BackfillError(f"--start/--end: {exc}") from None
    if a > b:
        raise BackfillError(f"--start {start} is after --end {end}")
    n = (b - a).days + 1
    if n > MAX_NIGHTS:
        raise BackfillError(f"{start}..{end} spans {n} nights, more than the {MAX_NIGHTS} one backfill accepts")
    return dates.date_range(start, end)


def _describe(row: pd.Series) -> str:
    version = row.get("version_id")
    tail = f" -> {version} ({row.get('state')})" if isinstance(version, str) and version else ""
    when = row.get("finished_at") if pd.notna(row.get("finished_at")) else row.get("started_at")
    when = pd.Timestamp(when).strftime("%Y-%m-%d %H:%M UTC") if pd.notna(when) else "?"
    return f"{row['kind']} run {row['run_id']} on {when}{tail}"


def plan_backfill(ws: Workspace, cfg: Config, start: str, end: str, force: bool = False) -> list[PlannedNight]:
    """One :class:`PlannedNight` per date of the range (see module docstring)."""
    dates = date_range(start, end)
    latest = latest_by_date(ws)
    try:
        in_logs = set(list_partition_dates(cfg.paths.logs))
    except IngestError as exc:
        raise BackfillError(f"paths.logs: {exc}") from None
    lock = read_lock(ws.lock)
    lock_live = lock is not None and not is_stale(lock, cfg.runtime.lock_stale_seconds)
    plan = []
    for d in dates:
        row = latest.loc[d] if d in latest.index else None
        status = None if row is None else row["status"]
        changed = None
        if status == "done" and not force and isinstance(row.get("inputs_key"), str):
            now = inputs_key(cfg.paths.logs, d, cfg)
            if now is not None and now != row["inputs_key"]:
                changed = f"inputs changed since it was done ({_describe(row)}): input files or config differ; re-run"
        if status in ("done", "skipped") and not force and changed is None:
            what = "done" if status == "done" else f"skipped ({row['message']})"
            plan.append(PlannedNight(d, "skip", f"{what}: {_describe(row)}"))
            continue
        if changed is not None:
            reason = changed
        elif status in ("done", "skipped"):
            reason = f"--force: re-run (was {status}: {_describe(row)})"
        elif status == "failed":
            reason = f"failed before ({row['message']}); retrying"
        elif status == "running" and lock_live:
            reason = f"a run is in progress ({_describe(row)}; lock held by {lock.get('what')})"
        elif status in ("running", "interrupted"):
            reason = f"interrupted before ({_describe(row)}); retrying"
        else:
            reason = "not run before"
        stops = d not in in_logs and cfg.input.missing_partition == "error"
        if d not in in_logs:
            reason += (f"; no dt={d} partition in {cfg.paths.logs}: " +
                       ("the backfill will stop here (input.missing_partition = 'error')" if stops
                        else "an empty day, recorded as skipped (input.missing_partition = 'skip')"))
        plan.append(PlannedNight(d, "run", reason, stops))
    return plan


def reach(plan: list[PlannedNight]) -> tuple[int, PlannedNight | None]:
    """How far a backfill of ``plan`` gets: (nights it will run, the night it stops at, or None when it
    gets through). A night that stops the backfill fails, so it is not counted as run."""
    ran = 0
    for p in plan:
        if p.action != "run":
            continue
        if p.stops:
            return ran, p
        ran += 1
    return ran, None


def chain_head(ws: Workspace, start: str, run_date: str) -> str | None:
    """Base for ``run_date`` in a ``live="last"`` backfill that started at ``start``: the version of the
    latest ``done`` run of a date in ``[start, run_date)``, or None (then the nightly rule applies)."""
    latest = latest_by_date(ws)
    if latest.empty:
        return None
    before = latest[(latest.index >= start) & (latest.index < run_date) & (latest["status"] == "done")
                    & latest["version_id"].notna()]
    return None if before.empty else str(before.sort_index()["version_id"].iloc[-1])


def may_go_live(ws: Workspace, run_date: str) -> bool:
    """False when the live version is from a later date than ``run_date`` (never move live back in time)."""
    live = live_version(ws)
    return live is None or read_manifest(ws, live).get("run_date", "") <= run_date


def make_live_for(ws: Workspace, live_mode: str, run_date: str, last_date: str) -> bool:
    if live_mode not in LIVE_MODES:
        raise BackfillError(f"--live must be one of {LIVE_MODES}, got {live_mode!r}")
    if live_mode == "last" and run_date != last_date:
        return False
    return may_go_live(ws, run_date)


def typical_night_seconds(ws: Workspace) -> float | None:
    """Median wall time of past completed runs (for a first time-left estimate), or None."""
    latest = latest_by_date(ws, kinds=("nightly", "backfill", "sweep"))
    done = latest[latest["status"] == "done"] if len(latest) else latest
    if done.empty:
        return None
    secs = (pd.to_datetime(done["finished_at"]) - pd.to_datetime(done["started_at"])).dt.total_seconds()
    secs = secs[secs > 0]
    return float(secs.median()) if len(secs) else None

