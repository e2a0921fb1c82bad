"""Sections about running unattended: runtime (with its time zone and cron checks), drift, alerts, labels."""

from __future__ import annotations

import datetime
from typing import Literal

from pydantic import Field, field_validator, model_validator

from tasks.config.base import _Section


def check_timezone(name: str) -> str:
    """``name`` if it is an IANA time zone name (``Europe/Berlin``, ``UTC``); else ValueError with the
    closest names. Checked with the standard library's ``zoneinfo`` (tz database from the system or the
    ``tzdata`` package)."""
    import difflib
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

    known = available_timezones()
    try:
        ZoneInfo(name)
        if name in known:
            return name
    except (ZoneInfoNotFoundError, ValueError, OSError):
        pass
    close = [z for z in known if z.lower() == name.lower()] or difflib.get_close_matches(name, known, n=2)
    hint = f"did you mean {' or '.join(repr(z) for z in close)}?" if close else "e.g. 'Europe/Berlin' or 'UTC'"
    raise ValueError(f"{name!r} is not an IANA time zone name; {hint}")


def check_cron(expr: str) -> str:
    """``expr`` if it is a 5-field cron expression (minute hour day-of-month month day-of-week); else
    ValueError saying which field is wrong. Parsed with ``cronsim`` (a cron parser that Prefect's own
    dependencies install); Prefect's schedule (``prefect.schedules.Cron``) reads the same five fields."""
    from cronsim import CronSim, CronSimError

    fields = expr.split()
    example = "e.g. '30 2 * * *' for 02:30 every day"
    if len(fields) != 5:
        raise ValueError(f"{expr!r} has {len(fields)} field(s); a cron schedule has 5 (minute hour "
                         f"day-of-month month day-of-week), {example}")
    try:
        CronSim(expr, datetime.datetime(2026, 1, 1))
    except CronSimError as exc:
        raise ValueError(f"{expr!r} is not a valid cron schedule ({exc}); {example}") from None
    return expr


class RuntimeConfig(_Section):
    timezone: str = Field("UTC", description="IANA zone; 'yesterday' and the schedule use it.")
    schedule: str = Field("30 2 * * *", description="Cron for the nightly deployment (5 fields: minute hour "
                          "day-of-month month day-of-week).")
    shadow: bool = Field(True, description="Train a plain shadow model beside the candidate.")
    runner: Literal["thread", "dask"] = Field("thread", description="Prefect task runner for the parallel parts "
                                             "of a night (files of a partition, blocks of users to score): "
                                             "'thread' = a thread pool in the run's process; 'dask' = "
                                             "prefect-dask (see flows/runners.py).")
    dask_address: str = Field("", description="Existing Dask scheduler address (e.g. tcp://host:8786); empty = "
                              "a local in-process cluster of runtime.workers workers.")
    workers: int = Field(0, ge=0, le=1024, description="Parallel tasks (threads or local Dask workers); 0 = the "
                         "machine's CPU count. Each scoring task holds up to debias.memory_budget_mb.")
    flow_timeout_seconds: int = Field(6 * 3600, ge=60, description="A nightly run taking longer is failed.")
    io_retries: int = Field(2, ge=0, le=20, description="Retries of a task after a transient I/O error.")
    lock_stale_seconds: int = Field(4 * 3600, ge=60, description="A store lock older than this with a dead "
                                    "holder is taken over.")
    min_ratings_to_train: int = Field(1, ge=1, description="Skip training on a date with fewer ratings in the window.")
    lock_wait_seconds: int = Field(1800, ge=0, description="A scheduled or flow-started run (nightly, backfill) "
                                   "waits this long for another run to release the workspace lock, then gives up "
                                   "with one line recorded in the ledger (status 'refused'). `tarewise run` and "
                                   "`backfill` from a terminal are refused at once instead.")
    catch_up: str = Field("all", description="Nights missed since the last done one (serve down, a dropped slot): "
                          "'all' runs them before the scheduled night, oldest first; 'last:N' only the N most "
                          "recent (the older ones are reported as missed in `status` and an alert); 'none' runs "
                          "none (all are reported).")
    catch_up_per_run: int = Field(0, ge=0, description="At most this many nights per scheduled run, oldest first "
                                  "(the scheduled night waits until the backlog is done); 0 = no limit.")
    min_free_mb: int = Field(200, ge=0, description="Commands that write refuse to start when the workspace's disk "
                             "has less free space than this (MB); 0 = no check. A night writes a version (model, "
                             "predictions), store and report files; 200 MB covers the demo many times over "
                             "(common practice, no source): raise it to a few versions' size for real data.")

    @field_validator("timezone")
    @classmethod
    def _zone(cls, v: str) -> str:
        return check_timezone(v)

    @field_validator("schedule")
    @classmethod
    def _cron(cls, v: str) -> str:
        return check_cron(v)

    @field_validator("catch_up")
    @classmethod
    def _catch_up(cls, v: str) -> str:
        v = v.strip().lower()
        if v in ("all", "none"):
            return v
        head, _, n = v.partition(":")
        if head == "last" and n.isdigit() and int(n) >= 1:
            return f"last:{int(n)}"
        raise ValueError(f"{v!r} is not 'all', 'none' or 'last:N' (N >= 1)")

    def catch_up_limit(self) -> int | None:
        """How many missed nights to run: None = all, 0 = none, N for 'last:N'."""
        if self.catch_up == "all":
            return None
        return 0 if self.catch_up == "none" else int(self.catch_up.split(":")[1])


class DriftConfig(_Section):
    baseline_nights: int = Field(14, ge=3, le=365, description="Trailing nights forming the baseline band.")
    min_baseline_nights: int = Field(5, ge=2, description="No skew alerts before this many nights of history.")
    mad_k: float = Field(4.0, gt=0.0, description="Band = median +- k * 1.4826 * MAD.")
    cooldown_nights: int = Field(3, ge=0, description="Same-kind alerts within this many nights fold into one.")
    min_probe_coverage: float = Field(0.005, ge=0.0, le=1.0, description="Alert when the night's share of active "
                                      "users with a probe rating falls below this.")
    max_quarantine_share: float = Field(0.02, ge=0.0, le=1.0, description="Alert above this rejected share.")

    @model_validator(mode="after")
    def _baseline_fits(self) -> "DriftConfig":
        if self.min_baseline_nights > self.baseline_nights:
            raise ValueError("drift.min_baseline_nights must not exceed drift.baseline_nights")
        return self


class AlertsConfig(_Section):
    webhook_url_env: str = Field("TAREWISE_WEBHOOK_URL", description="Environment variable holding the webhook URL "
                                 "(secrets never live in config files).")
    prefect_blocks: tuple[str, ...] = Field((), description="Names of Prefect notification blocks to notify.")
    retries: int = Field(3, ge=0, le=20, description="Delivery retries per receiver before recording a failure.")
    retry_delay_seconds: float = Field(1.0, ge=0.0, description="First retry delay; doubles each retry.")
    timeout_seconds: float = Field(10.0, gt=0.0, description="HTTP timeout of one delivery attempt.")
    backfill_delivery: Literal["record", "send"] = Field(
        "record", description="Alerts of backfill and sweep nights: 'record' keeps them in the history and "
        "report without sending (a replay would page people with stale alerts); 'send' delivers them.")


class LabelsConfig(_Section):
    """Words the report and the alerts use for a deployment's own domain."""
    user: str = Field("user", min_length=1, description="One person who rates, as the report calls them "
                      "(e.g. 'member', 'student', 'customer').")
    users: str = Field("users", min_length=1, description="Plural of labels.user.")
    item: str = Field("item", min_length=1, description="One thing that is rated (e.g. 'title', 'course', 'recipe').")
    items: str = Field("items", min_length=1, description="Plural of labels.item.")
    rating_unit: str = Field("rating points", min_length=1, description="Unit written after a rating or a "
                             "difference of ratings (e.g. 'stars': '+0.30 stars').")
    rating_symbol: str = Field("", description="Short form of the unit beside the report's headline numbers "
                               "(e.g. '\u2605'); empty: labels.rating_unit.")

    @property
    def unit_short(self) -> str:
        """The unit beside a headline number: ``rating_symbol``, else ``rating_unit``."""
        return self.rating_symbol or self.rating_unit
