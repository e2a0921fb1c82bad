"""Nights the schedule owes: the ledger compared with the nightly schedule, so no night is lost.

A scheduled run for night D owes every night after the last one done (or skipped as empty or thin) before
D, up to D itself. ``runtime.catch_up`` says how many of the owed earlier nights it runs first, oldest
first: ``all``, ``last:N`` (the N most recent; the older ones are *missed*) or ``none`` (all missed).
``runtime.catch_up_per_run`` caps the nights one run takes on (oldest first; the scheduled night then
waits for a later run, so dates stay in order and live never moves back in time). Missed nights are named
in an alert by the scheduled run and, as gaps, in ``tarewise status``; ``tarewise backfill`` fills them.

A workspace with no night done yet owes nothing before its first scheduled night (there is no history to
continue from: run a backfill to start from an earlier date).

Plain functions over the ledger; ``flows/deployments.py`` orchestrates.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from zoneinfo import ZoneInfo

from tasks import dates
from tasks.config import Config
from tasks.ledger import latest_by_date
from tasks.operate.doctor import NOTE, Finding
from tasks.workspace import Workspace

SETTLED = ("done", "skipped")


@dataclass(frozen=True)
class CatchUp:
    """``run``: nights to run now, oldest first (the scheduled night last, when it fits); ``missed``:
    owed nights that will not be run (``runtime.catch_up``); ``waiting``: owed nights left for later runs
    (``runtime.catch_up_per_run``)."""
    run: list[str]
    missed: list[str] = field(default_factory=list)
    waiting: list[str] = field(default_factory=list)


def settled_dates(ws: Workspace) -> list[str]:
    """Dates whose latest nightly or backfill run is done or skipped, sorted."""
    latest = latest_by_date(ws)
    if latest.empty:
        return []
    return sorted(str(d) for d in latest.index[latest["status"].isin(SETTLED)])


def owed(ws: Workspace, run_date: str) -> list[str]:
    """Nights after the last settled one before ``run_date``, up to ``run_date`` excluded, not settled."""
    settled = set(settled_dates(ws))
    before = [d for d in settled if d < run_date]
    if not before:
        return []
    start = dates.shift(max(before), 1)
    if start >= run_date:
        return []
    return [d for d in dates.date_range(start, dates.shift(run_date, -1)) if d not in settled]


def plan_catch_up(ws: Workspace, cfg: Config, run_date: str) -> CatchUp:
    """What the scheduled run for ``run_date`` does (see module docstring)."""
    gap = owed(ws, run_date)
    limit = cfg.runtime.catch_up_limit()
    caught = gap if limit is None else (gap[len(gap) - limit:] if limit else [])
    missed = gap[:len(gap) - len(caught)]
    todo = caught + [run_date]
    per_run = cfg.runtime.catch_up_per_run
    if per_run and len(todo) > per_run:
        return CatchUp(todo[:per_run], missed, todo[per_run:])
    return CatchUp(todo, missed)


def last_slot_night(cfg: Config, now: dt.datetime | None = None) -> str:
    """The night owed by the latest slot of ``runtime.schedule`` at or before ``now``: the day before
    that slot in ``runtime.timezone`` (what a run started at that slot processes)."""
    from cronsim import CronSim

    zone = ZoneInfo(cfg.runtime.timezone)
    now = (now or dt.datetime.now(dt.timezone.utc)).astimezone(zone).replace(tzinfo=None)
    slot = next(CronSim(cfg.runtime.schedule, now + dt.timedelta(seconds=1), reverse=True))
    return dates.night_before(slot.replace(tzinfo=zone), cfg.runtime.timezone)


def due_at_start(ws: Workspace, cfg: Config, now: dt.datetime | None = None) -> list[str]:
    """Nights whose slot has passed and that are not settled, since the last settled one (for ``serve``
    on start: a restart or an outage must not lose them). Empty for a workspace with no night done."""
    night = last_slot_night(cfg, now)
    settled = set(settled_dates(ws))
    if not settled:
        return []
    return owed(ws, night) + ([night] if night not in settled else [])


def gaps(ws: Workspace, today: str) -> dict:
    """For ``status``: ``holes`` (dates between the first and last settled night that are not settled)
    and ``behind`` (nights from the last settled one to the day before ``today``)."""
    settled = settled_dates(ws)
    if not settled:
        return {"holes": [], "behind": 0, "last": None}
    have = set(settled)
    holes = [d for d in dates.date_range(settled[0], settled[-1]) if d not in have]
    behind = max(dates.days_between(settled[-1], dates.shift(today, -1)), 0)
    return {"holes": holes, "behind": behind, "last": settled[-1]}


def night_findings(ws: Workspace, today: str) -> list[Finding]:
    """``status``'s line about lost nights: dates not done between done ones (a note: nothing fails, but
    someone may want to fill them). How far the newest night is from today is not a finding: a workspace
    that replays history, or runs without a schedule, is not behind anything."""
    h = gaps(ws, today)["holes"]
    if not h:
        return []
    shown = ", ".join(h) if len(h) <= 6 else f"{h[0]}..{h[-1]} ({len(h)} dates)"
    return [Finding(NOTE, f"night(s) not done between done ones: {shown}",
                    f"fill them: tarewise backfill --start {h[0]} --end {h[-1]}")]
