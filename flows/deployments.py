"""Prefect deployments for unattended operation: the nightly run on a cron schedule, backfill on demand.

Config travels as a parameter. ``tarewise serve`` validates the config file once, resolves its paths
to absolute ones and passes the whole validated config as the deployment parameter ``settings`` (a
JSON object). Each run validates it again (``parse_config``; a value edited in the Prefect UI fails with
the key named), so a run never depends on a file that may have changed or is absent on a worker's
machine, and the UI shows exactly what the runs use. Changing the config means running
``tarewise serve`` again (it re-registers the deployments; the schedule comes from the config too).

No overlap: each deployment has a concurrency limit of one with the ENQUEUE strategy: a run that
would overlap waits until the one in progress ends. A queued scheduled run still processes its own
night, because its date comes from its *scheduled* start time, not from when it starts. Runs of
different deployments, and runs started by hand (``tarewise run``/``backfill``), are kept apart by the
workspace lock (``tasks/lock.py``): the later one is refused with the holder named, and a lock whose
holder died is taken over. Each night has the flow timeout ``runtime.flow_timeout_seconds``.
"""

from __future__ import annotations

import os
import signal
from datetime import datetime
from pathlib import Path
from typing import Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from prefect import flow, get_run_logger
from prefect.client.schemas.objects import ConcurrencyLimitConfig, ConcurrencyLimitStrategy
from prefect.deployments.runner import EntrypointType, RunnerDeployment
from prefect.schedules import Cron

from flows import run_guard
from flows.backfill import backfill
from flows.nightly import nightly_for
from tasks.config import Config, ConfigError, parse_config
from tasks.dates import night_before
from tasks.operate.catch_up import due_at_start, plan_catch_up
from tasks.workspace import Workspace

NIGHTLY_DEPLOYMENT = "nightly"
BACKFILL_DEPLOYMENT = "backfill"
COLLISION = ConcurrencyLimitStrategy.ENQUEUE
TAGS = ["tarewise"]


def night_for(scheduled: datetime, timezone: str) -> str:
    """The night a run scheduled at ``scheduled`` processes: the day before, in ``timezone``."""
    return night_before(scheduled, timezone)


def _settings(settings: dict) -> Config:
    return parse_config(settings, source="deployment parameter 'settings'")


@flow(name="tarewise-scheduled-nightly")
def scheduled_nightly(settings: dict, run_date: str | None = None) -> dict:
    """One scheduled night: ``run_date`` defaults to the day before the run's scheduled start (in
    ``runtime.timezone``), so a run that waited in the queue still processes its own night.

    First the ledger is compared with the schedule (``tasks/operate/catch_up.py``): nights owed since the
    last done one run before it, oldest first, as ``runtime.catch_up`` and ``runtime.catch_up_per_run``
    allow; owed nights that will not be run are named in a ``missed_nights`` alert. A failed night does
    not stop the later ones (its date shows as a gap in ``tarewise status``; the run ends Failed).
    Returns the last night's result, with ``nights`` (every night run) and ``missed``."""
    cfg = _settings(settings)
    log = get_run_logger()
    if run_date is None:
        from prefect.runtime import flow_run
        run_date = night_for(flow_run.scheduled_start_time, cfg.runtime.timezone)
    ws = Workspace.at(cfg.paths.workspace)
    plan = plan_catch_up(ws, cfg, run_date)
    if plan.missed:
        text = (f"{len(plan.missed)} night(s) missed and not caught up (runtime.catch_up = "
                f"'{cfg.runtime.catch_up}'): {_dates(plan.missed)}; fill them with `tarewise backfill --start "
                f"{plan.missed[0]} --end {plan.missed[-1]}`")
        log.warning(text)
        run_guard.send_alert(cfg, ws, "missed_nights", run_date, text, "nightly", value=float(len(plan.missed)))
    if len(plan.run) > 1 or plan.waiting:
        log.warning("catching up %d night(s) in date order: %s%s", len(plan.run), _dates(plan.run),
                    f"; {len(plan.waiting)} more wait for the next runs (runtime.catch_up_per_run = "
                    f"{cfg.runtime.catch_up_per_run})" if plan.waiting else "")
    nights, failed = [], []
    for d in plan.run:
        try:
            nights.append(nightly_for(cfg, flow_run_name=f"night {d}")(cfg=cfg, run_date=d))
        except Exception as exc:  # noqa: BLE001 - one failed night must not stop the later ones
            log.error("night %s failed: %s: %s", d, type(exc).__name__, exc)
            failed.append(f"{d}: {type(exc).__name__}: {exc}")
        stop = run_guard.stop_requested()
        if stop and d != plan.run[-1]:   # held back while night d finished its bookkeeping: stop here now
            log.warning("%s received during night %s: the %d later night(s) wait for the next run", stop, d,
                        len(plan.run) - plan.run.index(d) - 1)
            os.kill(os.getpid(), getattr(signal, stop))
    if failed:
        raise ScheduledRunFailed(f"{len(failed)} of {len(plan.run)} night(s) failed: " + "; ".join(failed))
    return {**nights[-1], "nights": [n["run_date"] for n in nights], "missed": plan.missed}


class ScheduledRunFailed(RuntimeError):
    """A night of a scheduled run failed (the others ran; each is in the ledger)."""


def _dates(ds: list[str]) -> str:
    return ", ".join(ds) if len(ds) <= 6 else f"{ds[0]}..{ds[-1]}"


@flow(name="tarewise-scheduled-backfill")
def scheduled_backfill(settings: dict, start: str, end: str, live: Literal["last", "each"] = "last",
                       force: bool = False) -> dict:
    """A backfill started from the Prefect UI or API (``start``/``end`` given per run)."""
    return backfill(cfg=_settings(settings), start=start, end=end, live=live, force=force)


def deployment_settings(cfg: Config) -> dict:
    """The validated config as JSON, with local paths made absolute (runs may start elsewhere)."""
    raw = cfg.model_dump(mode="json")
    for key in ("logs", "workspace", "shared"):
        value = raw["paths"][key]
        if value and "://" not in value:
            raw["paths"][key] = str(Path(value).expanduser().resolve())
    return raw


def check_schedule(cfg: Config) -> Cron:
    """The nightly schedule, or :class:`ConfigError` naming ``runtime.timezone``/``runtime.schedule``."""
    try:
        ZoneInfo(cfg.runtime.timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError(f"runtime.timezone: {cfg.runtime.timezone!r} is not an IANA time zone "
                          "(e.g. 'Europe/Berlin', 'UTC')") from None
    try:
        return Cron(cfg.runtime.schedule, timezone=cfg.runtime.timezone)
    except ValueError as exc:
        raise ConfigError(f"runtime.schedule: {cfg.runtime.schedule!r} is not a valid cron string "
                          f"({exc})") from None


def build_deployments(cfg: Config) -> list[RunnerDeployment]:
    """The two deployments (not yet registered): ``tarewise-scheduled-nightly/nightly`` on the cron
    schedule, ``tarewise-scheduled-backfill/backfill`` with no schedule (start it with parameters)."""
    schedule = check_schedule(cfg)
    settings = deployment_settings(cfg)
    limit = ConcurrencyLimitConfig(limit=1, collision_strategy=COLLISION)
    common = dict(concurrency_limit=limit, tags=TAGS, entrypoint_type=EntrypointType.MODULE_PATH)
    night = scheduled_nightly.to_deployment(
        name=NIGHTLY_DEPLOYMENT, schedule=schedule, parameters={"settings": settings},
        description=f"tarewise nightly run at '{cfg.runtime.schedule}' ({cfg.runtime.timezone}) on "
                    f"workspace {settings['paths']['workspace']}", **common)
    fill = scheduled_backfill.to_deployment(
        name=BACKFILL_DEPLOYMENT, parameters={"settings": settings, "live": "last", "force": False},
        description=f"tarewise backfill of a date range on workspace {settings['paths']['workspace']}; "
                    "give start and end (YYYY-MM-DD) per run", **common)
    return [night, fill]


def catch_up_on_start(cfg: Config) -> str | None:
    """``serve`` on start: when nights whose slot has passed are not done (serve was down, a restart dropped
    a slot), start one nightly run now for the latest of them (it catches up the rest first). Returns the
    line to print, or None when nothing is owed. Needs the deployments registered."""
    due = due_at_start(Workspace.at(cfg.paths.workspace), cfg)
    if not due:
        return None
    from prefect.deployments import run_deployment
    run = run_deployment(f"{scheduled_nightly.name}/{NIGHTLY_DEPLOYMENT}", parameters={"run_date": due[-1]},
                         timeout=0, flow_run_name=f"catch-up to {due[-1]}")
    return (f"{len(due)} night(s) owed since the last done one ({_dates(due)}): started run {run.name} "
            f"({run.id}) to catch up (runtime.catch_up = '{cfg.runtime.catch_up}')")


def paused_deployments() -> list:
    """``status``'s check of the two deployments on the Prefect server named by ``PREFECT_API_URL`` (none
    set: nothing to check): a paused one is a problem (no scheduled run fires until it is resumed)."""
    from tasks.operate.doctor import NOTE, PROBLEM, Finding
    if not os.environ.get("PREFECT_API_URL"):
        return []
    from prefect.client.orchestration import get_client
    out = []
    try:
        with get_client(sync_client=True) as client:
            for name in (f"{scheduled_nightly.name}/{NIGHTLY_DEPLOYMENT}", f"{scheduled_backfill.name}/{BACKFILL_DEPLOYMENT}"):
                try:
                    dep = client.read_deployment_by_name(name)
                except Exception:  # noqa: BLE001 - not registered (yet) is not a fault
                    continue
                if dep.paused:
                    what = "no scheduled night runs" if name.endswith(NIGHTLY_DEPLOYMENT) else "its runs wait"
                    out.append(Finding(PROBLEM, f"deployment {name} is paused (stopping `tarewise serve` pauses it): "
                                                f"{what}",
                                       "run `tarewise serve` again (or turn its schedule on in the Prefect UI)"))
    except Exception as exc:  # noqa: BLE001 - status never crashes
        out.append(Finding(NOTE, f"deployments not checked: the Prefect API at {os.environ['PREFECT_API_URL']} did "
                                 f"not answer ({type(exc).__name__})", "start the server, or unset PREFECT_API_URL"))
    return out
