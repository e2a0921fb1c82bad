"""Delivery of folded alerts: history phases, which receivers are contacted and when, outcomes recorded.

Receivers are real: an HTTP server on 127.0.0.1 for the webhook (tests/receivers.py), and channels that
are plain functions recording what they were handed (the flow's Prefect channels are tested in
tests/flows/test_alert_channels.py)."""

from __future__ import annotations

import json
import logging

import pytest

from receivers import ENV_NAME, Receiver, no_secret
from tasks.config import Config
from tasks.monitor.alert_delivery import Channels, deliver_alerts, deliver_night
from tasks.monitor.alert_history import AlertHistory, night_alerts, read_history
from tasks.monitor.alert_rules import Alert


def _cfg(**alerts) -> Config:
    base = {"alerts.retries": 2, "alerts.retry_delay_seconds": 0.01, "alerts.timeout_seconds": 5.0}
    return Config().updated({**base, **{f"alerts.{k}": v for k, v in alerts.items()}})


def _alert(date: str = "2024-03-21", status: str = "new", count: int = 1, kind: str = "skew_shift") -> Alert:
    return Alert(kind=kind, severity="warning", metric="skew_mean_shift", value=0.62, band=(0.1, 0.4),
                 explanation="Selection skew moved (invented numbers).", run_date=date,
                 alert_id=f"{kind}-2024-03-21", status=status, count=count, first_date="2024-03-21",
                 last_date=date)


class Recorder:
    """A channel that keeps what it was handed and answers with ``outcome``."""

    def __init__(self, outcome: str = "ok"):
        self.outcome, self.records = outcome, []

    def __call__(self, record) -> dict:
        self.records.append(dict(record))
        return {"outcome": self.outcome}


def _deliver(ws, alerts, cfg, channels=Channels(), env=None, send=True):
    return deliver_alerts(AlertHistory.read(ws), alerts, cfg, channels, env=env or {}, send=send)


def test_webhook_delivered_pending_then_final_and_secret_kept_out(ws):
    with Receiver() as rx:
        [final] = _deliver(ws, [_alert()], _cfg(), env={ENV_NAME: rx.url})
    assert len(rx.requests) == 1 and json.loads(rx.requests[0]["body"])["alert"]["alert_id"] == "skew_shift-2024-03-21"
    assert final["delivery"]["webhook"] == {"target": "http://127.0.0.1", "outcome": "ok", "attempts": 1}
    phases = [(r["alert_id"], r["phase"]) for r in read_history(ws)]
    assert phases == [("skew_shift-2024-03-21", "pending"), ("skew_shift-2024-03-21", "final")]
    assert final == read_history(ws)[-1]    # what delivery returns is what the history holds
    no_secret(ws.alerts.read_text())


def test_failed_receiver_is_recorded_and_the_alert_kept(ws):
    with Receiver(status=500) as rx:
        [final] = _deliver(ws, [_alert()], _cfg(retries=1), env={ENV_NAME: rx.url})  # must not raise
    assert final["delivery"]["webhook"]["outcome"] == "failed" and len(rx.requests) == 2
    [kept] = night_alerts(read_history(ws), "2024-03-21")
    assert kept["phase"] == "final" and kept["explanation"].startswith("Selection skew moved")


def test_channels_get_the_record_and_their_outcomes_are_recorded(ws):
    event, ops, mail = Recorder(), Recorder(), Recorder("failed")
    channels = Channels(event=event, blocks={"custom-webhook/ops": ops, "email/ops": mail})
    [final] = _deliver(ws, [_alert()], _cfg(), channels)
    assert final["delivery"]["event"] == {"outcome": "ok"}
    assert final["delivery"]["blocks"] == {"custom-webhook/ops": {"outcome": "ok"}, "email/ops": {"outcome": "failed"}}
    [rec] = event.records
    assert rec["alert_id"] == "skew_shift-2024-03-21" and rec["recorded_at"] and "phase" not in rec
    assert ops.records == event.records == mail.records


def test_folded_alert_is_recorded_not_resent(ws):
    event, ops = Recorder(), Recorder()
    with Receiver() as rx:
        [final] = _deliver(ws, [_alert("2024-03-22", status="ongoing", count=2)], _cfg(),
                           Channels(event=event, blocks={"custom-webhook/ops": ops}), env={ENV_NAME: rx.url})
    assert rx.requests == [] and event.records == [] and ops.records == []
    d = final["delivery"]
    assert d["webhook"]["outcome"] == d["event"]["outcome"] == d["blocks"]["custom-webhook/ops"]["outcome"] == "suppressed"
    assert final["count"] == 2 and final["first_date"] == "2024-03-21" and final["last_date"] == "2024-03-22"


def test_rerun_retries_only_what_failed(ws):
    cfg = _cfg(retries=0)
    event = Recorder()
    with Receiver(status=500) as rx:
        _deliver(ws, [_alert()], cfg, Channels(event=event), env={ENV_NAME: rx.url})
        rx.status = 200
        [second] = _deliver(ws, [_alert()], cfg, Channels(event=event), env={ENV_NAME: rx.url})
        [third] = _deliver(ws, [_alert()], cfg, Channels(event=event), env={ENV_NAME: rx.url})
    assert len(rx.requests) == 2  # failed try, successful retry on the re-run, nothing on the third run
    assert len(event.records) == 1  # the event went out on the first run and is not repeated
    assert second["delivery"]["webhook"]["outcome"] == "ok"
    assert third["delivery"]["webhook"]["reason"] == "delivered on an earlier run of this night"
    assert third["delivery"]["event"]["reason"] == "delivered on an earlier run of this night"


def test_without_receivers_the_history_still_gets_the_alert(ws):
    [final] = _deliver(ws, [_alert()], _cfg())
    assert final["delivery"] == {"event": {"outcome": "skipped", "reason": "no event channel"},
                                 "webhook": {"outcome": "not_configured",
                                             "reason": f"environment variable {ENV_NAME} is not set"},
                                 "blocks": {}}


def test_delivery_lines_go_to_the_channels_logger(ws, caplog):
    log = logging.getLogger("tarewise.test-run")
    with caplog.at_level(logging.INFO, logger="tarewise.test-run"):
        _deliver(ws, [_alert()], _cfg(), Channels(log=log))
    [line] = [r for r in caplog.records if r.name == "tarewise.test-run"]
    assert line.levelno == logging.WARNING
    assert "alert skew_shift-2024-03-21 (warning, new)" in line.getMessage() and "webhook: not_configured" in line.getMessage()


@pytest.mark.parametrize("kind, backfill_delivery, sent", [("nightly", "record", True), ("backfill", "record", False),
                                                          ("sweep", "record", False), ("backfill", "send", True)])
def test_only_nightly_runs_send_unless_configured(ws, kind, backfill_delivery, sent):
    event = Recorder()
    with Receiver() as rx:
        [rec] = deliver_night(AlertHistory.read(ws), "2024-03-21", [_alert()], _cfg(backfill_delivery=backfill_delivery),
                              Channels(event=event), kind, env={ENV_NAME: rx.url})
    assert (len(rx.requests), len(event.records)) == ((1, 1) if sent else (0, 0))
    assert rec["delivery"]["webhook"]["outcome"] == ("ok" if sent else "record_only")
    assert night_alerts(read_history(ws), "2024-03-21")   # recorded either way: the history and report have it
