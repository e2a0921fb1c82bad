"""Delivery of one night's folded alerts: record each in the history, send new ones, record the outcomes.

Receivers of an alert whose status is "new" (first night of an episode, see ``alert_rules``):

- the event channel (the flow hands in one that emits the Prefect event ``tarewise.alert.<kind>``);
- a generic JSON webhook (``webhook.py``), URL read from the environment variable named by
  ``alerts.webhook_url_env`` (never from a config file);
- each named notification channel (the flow hands in one per Prefect notification block listed in
  ``alerts.prefect_blocks``).

Channels are plain callables (:class:`Channel`), so this module knows nothing of Prefect; the flow
builds them (``flows/alert_channels.py``). "ongoing" alerts (folded by the cool-down) are recorded but
not sent again. Alerts of backfill and sweep nights are recorded but not sent unless
``alerts.backfill_delivery = "send"``: replaying a season of history would otherwise page people with a
burst of stale alerts. Delivery never raises for a receiver's problem; only a failure to write the
history file itself propagates (then there is nowhere to keep the alert, and the run should fail loudly).
"""

from __future__ import annotations

import logging
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Protocol

from tasks.config import Config
from tasks.monitor.alert_history import (
    FINAL,
    NOT_CONFIGURED,
    OK,
    PENDING,
    RECORD_ONLY,
    SKIPPED,
    SUPPRESSED,
    AlertHistory,
    now,
)
from tasks.monitor.alert_rules import Alert
from tasks.monitor.webhook import redact_url, send_webhook

_log = logging.getLogger("tarewise.alerts")


class Channel(Protocol):
    """A receiver: takes an alert record (``Alert.to_record()`` plus ``recorded_at``) and returns its
    outcome as recorded in the history (``{"outcome": ..., ...}``). Never raises."""

    def __call__(self, record: Mapping) -> dict: ...


@dataclass(frozen=True)
class Channels:
    """Receivers besides the webhook, and where delivery logs. ``event``: None records the event as
    skipped; ``blocks``: notification channels by the name recorded in the history."""

    event: Channel | None = None
    blocks: Mapping[str, Channel] = field(default_factory=dict)
    log: logging.Logger | logging.LoggerAdapter = _log


_NO_EVENT = {"outcome": SKIPPED, "reason": "no event channel"}


def _everywhere(note: dict, channels: Channels) -> dict:
    return {"event": note, "webhook": note, "blocks": {name: note for name in channels.blocks}}


def _send(rec: Mapping, alert: Alert, history: AlertHistory, url: str, cfg: Config, channels: Channels) -> dict:
    """Send to every receiver that has not already succeeded for this alert on an earlier run of the night."""
    done = history.delivered_before(alert.alert_id, alert.run_date)
    again = {"outcome": OK, "reason": "delivered on an earlier run of this night"}
    delivery: dict[str, object] = {}
    delivery["event"] = again if "event" in done else (channels.event(rec) if channels.event else dict(_NO_EVENT))
    if not url:
        delivery["webhook"] = {"outcome": NOT_CONFIGURED,
                               "reason": f"environment variable {cfg.alerts.webhook_url_env} is not set"}
    elif "webhook" in done:
        delivery["webhook"] = {"target": redact_url(url), **again}
    else:
        delivery["webhook"] = send_webhook(url, rec, cfg)
    delivery["blocks"] = {name: again if f"block:{name}" in done else send(rec)
                          for name, send in channels.blocks.items()}
    return delivery


def deliver_alerts(history: AlertHistory, alerts: Sequence[Alert], cfg: Config, channels: Channels = Channels(),
                   env: Mapping[str, str] | None = None, send: bool = True) -> list[dict]:
    """Record and deliver folded alerts (see module docstring). Returns the final history records.

    ``env``: where the webhook URL variable is looked up (default ``os.environ``). ``send=False``
    records every alert with outcome ``record_only`` and contacts no receiver.
    """
    env = os.environ if env is None else env
    url = (env.get(cfg.alerts.webhook_url_env) or "").strip()
    finals = []
    for alert in alerts:
        rec = {**alert.to_record(), "recorded_at": now()}
        history.append({**rec, "phase": PENDING, "delivery": {}})
        if not send:
            delivery = _everywhere({"outcome": RECORD_ONLY, "reason": "not sent: backfill or sweep night "
                                                                      "(alerts.backfill_delivery = \"record\")"},
                                   channels)
        elif alert.status != "new":
            delivery = _everywhere({"outcome": SUPPRESSED, "reason": f"cool-down: folded into {alert.alert_id} "
                                                                     f"(night {alert.count} since {alert.first_date})"},
                                   channels)
        else:
            delivery = _send(rec, alert, history, url, cfg, channels)
        finals.append(history.append({**rec, "phase": FINAL, "delivery": delivery, "recorded_at": now()}))
        channels.log.log(logging.WARNING if alert.severity != "info" else logging.INFO,
                         "alert %s (%s, %s): %s | %s", alert.alert_id, alert.severity, alert.status,
                         alert.explanation, _delivery_summary(delivery))
    return finals


def deliver_night(history: AlertHistory, run_date: str, alerts: Sequence[Alert], cfg: Config, channels: Channels,
                  kind: str = "nightly", env: Mapping[str, str] | None = None) -> list[dict]:
    """One night's delivery: withdraw what a re-run of ``run_date`` no longer raises, then record and
    deliver ``alerts`` (folded). Only "nightly" runs send unless ``alerts.backfill_delivery`` says "send".
    Returns the final history records."""
    for rec in history.withdraw_stale(run_date, alerts):
        channels.log.info("alert %s of %s withdrawn: a re-run no longer raises it", rec["alert_id"], run_date)
    send = kind == "nightly" or cfg.alerts.backfill_delivery == "send"
    return deliver_alerts(history, alerts, cfg, channels, env=env, send=send)


def _delivery_summary(delivery: Mapping) -> str:
    parts = []
    for key in ("event", "webhook"):
        d = delivery.get(key) or {}
        if d:
            target = f" {d['target']}" if d.get("target") else ""
            parts.append(f"{key}{target}: {d.get('outcome')}"
                         + (f" after {d['attempts']} attempt(s)" if d.get("attempts") else "")
                         + (f" ({d['error']})" if d.get("error") else ""))
    for name, d in (delivery.get("blocks") or {}).items():
        parts.append(f"block {name}: {d.get('outcome')}" + (f" ({d['error']})" if d.get("error") else ""))
    return "; ".join(parts)
