"""Prefect's alert receivers, handed to ``tasks/monitor/alert_delivery.py`` as plain channels.

- the event channel emits the Prefect event ``tarewise.alert.<kind>`` (inside a Prefect run, or when
  ``PREFECT_API_URL`` is set; outside both it is skipped rather than starting a temporary API server
  just for it);
- one channel per Prefect notification block named in ``alerts.prefect_blocks`` as
  ``<block-type-slug>/<name>``, with the configured retries;
- delivery logs to the run's logger inside a Prefect run, else to the ``tarewise.alerts`` logger.

Every channel returns its outcome and never raises (``alert_delivery.Channel``).
"""

from __future__ import annotations

import contextlib
import logging
from collections.abc import Mapping

import httpx

from tasks.config import Config
from tasks.monitor.alert_delivery import Channels
from tasks.monitor.alert_history import FAILED, OK, SKIPPED
from tasks.monitor.webhook import describe_error, redacting_http_logs, summary_line, with_retries


def in_prefect_run() -> bool:
    from prefect.context import FlowRunContext, TaskRunContext
    return FlowRunContext.get() is not None or TaskRunContext.get() is not None


def _api_url() -> str | None:
    from prefect.settings import get_current_settings
    return get_current_settings().api.url


def send_event(rec: Mapping) -> dict:
    """Emit the Prefect event ``tarewise.alert.<kind>`` for an alert record. Never raises."""
    try:
        if not (in_prefect_run() or _api_url()):
            return {"outcome": SKIPPED, "reason": "not in a Prefect run and no PREFECT_API_URL"}
        from prefect.events import emit_event

        payload = {k: v for k, v in rec.items() if k not in ("delivery", "phase")}
        event = emit_event(
            event=f"tarewise.alert.{rec['kind']}",
            resource={"prefect.resource.id": f"tarewise.alert.{rec['alert_id']}",
                      "prefect.resource.name": f"{rec['kind']} {rec['first_date']}",
                      "tarewise.severity": str(rec["severity"]),
                      "tarewise.run-date": str(rec["run_date"])},
            payload=payload,
        )
    except Exception as exc:  # noqa: BLE001 - delivery must never raise
        return {"outcome": FAILED, "error": describe_error(exc, [])}
    if event is None:
        return {"outcome": SKIPPED, "reason": "this Prefect client does not emit events"}
    return {"outcome": OK, "event_id": str(event.id)}


def send_block(name: str, rec: Mapping, cfg: Config) -> dict:
    """Notify the Prefect notification block ``<block-type-slug>/<name>`` with retries. Never raises."""
    if "/" not in name:
        return {"outcome": FAILED, "attempts": 0,
                "error": f"alerts.prefect_blocks entry {name!r} must read '<block-type-slug>/<block-name>'"}

    def call() -> None:
        from prefect.blocks.abstract import NotificationBlock
        from prefect.blocks.core import Block

        block = Block.load(name)
        if not isinstance(block, NotificationBlock):
            raise TypeError(f"Prefect block {name!r} is a {type(block).__name__}, not a notification block")
        # Apprise-based blocks log a failed send and return unless asked to raise (Prefect 3 API reference,
        # prefect.blocks.notifications: raise_on_failure, "causes the block to raise errors").
        guard = block.raise_on_failure() if hasattr(block, "raise_on_failure") else contextlib.nullcontext()
        with guard:
            block.notify(summary_line(rec), subject=f"tarewise {rec['severity']}: {rec['kind']}")

    def give_up(exc: BaseException) -> bool:
        # A missing block or a block of the wrong type stays wrong on retry.
        return isinstance(exc, (ValueError, TypeError, KeyError)) and not isinstance(exc, httpx.HTTPError)

    with redacting_http_logs([]):
        return with_retries(call, cfg.alerts.retries, cfg.alerts.retry_delay_seconds, [], give_up)


def _logger() -> logging.Logger | logging.LoggerAdapter:
    try:
        if in_prefect_run():
            from prefect.logging import get_run_logger
            return get_run_logger()
    except Exception:  # noqa: BLE001 - logging must not break delivery
        pass
    return logging.getLogger("tarewise.alerts")


def prefect_channels(cfg: Config) -> Channels:
    """The event channel, one channel per ``alerts.prefect_blocks`` entry (in config order), and the
    run's logger. Build it inside the run whose logger should carry the delivery lines."""
    def block(name: str):
        return lambda rec: send_block(name, rec, cfg)

    return Channels(event=send_event, blocks={name: block(name) for name in cfg.alerts.prefect_blocks},
                    log=_logger())
