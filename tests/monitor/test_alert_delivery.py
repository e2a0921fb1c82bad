"""Alert history and delivery against real receivers: an HTTP server on 127.0.0.1 in a thread, a closed
port, and (with the session's temporary Prefect API) a Prefect notification block and event."""

from __future__ import annotations

import json
import logging
import socket
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest

from tasks.monitor.alert_delivery import (
    append_history,
    deliver_alerts,
    night_alerts,
    raise_alerts,
    read_history,
    redact_url,
)
from tasks.config import Config
from tasks.monitor.alert_rules import Alert
from tasks.monitor.metrics_store import write_night_metrics

TOKEN = "s3cr3t-T0KEN-7f2a"
QUERY_KEY = "k3y-9bd1"
ENV_NAME = "TAREWISE_WEBHOOK_URL"


class Receiver:
    """A JSON webhook receiver: records every request; answers with ``status``."""

    def __init__(self, status: int = 200):
        self.status = status
        self.requests: list[dict] = []
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):  # noqa: N802 - http.server naming
                length = int(self.headers.get("Content-Length") or 0)
                body = self.rfile.read(length)
                receiver.requests.append({"path": self.path, "body": body,
                                          "content_type": self.headers.get("Content-Type")})
                self.send_response(receiver.status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):  # the receiver's own access log is not ours to test
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.server.server_address[1]}/hooks/{TOKEN}?key={QUERY_KEY}"

    def __enter__(self) -> "Receiver":
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.server.shutdown()
        self.server.server_close()


def _closed_port_url() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    return f"http://127.0.0.1:{port}/hooks/{TOKEN}?key={QUERY_KEY}"


def _cfg(**alerts) -> Config:
    base = {"alerts.retries": 2, "alerts.retry_delay_seconds": 0.01, "alerts.timeout_seconds": 5.0}
    return Config().updated({**base, **{f"alerts.{k}": v for k, v in alerts.items()}})


def _alert(date: str = "2024-03-21", status: str = "new", count: int = 1,
           kind: str = "skew_shift") -> Alert:
    return Alert(kind=kind, severity="warning", metric="skew_mean_shift", value=0.62, band=(0.1, 0.4),
                 explanation="Selection skew moved (invented numbers).", run_date=date,
                 alert_id=f"{kind}-2024-03-21", status=status, count=count, first_date="2024-03-21",
                 last_date=date)


def _no_secret(text: str) -> None:
    assert TOKEN not in text and QUERY_KEY not in text


@pytest.fixture
def all_logs(caplog):
    caplog.set_level(logging.DEBUG)
    for name in ("httpx", "httpcore", "tarewise"):
        caplog.set_level(logging.DEBUG, logger=name)
    return caplog


def test_webhook_delivered_to_a_real_server_and_secret_kept_out(ws, all_logs, capsys):
    with Receiver() as rx:
        [final] = deliver_alerts(ws, [_alert()], _cfg(), env={ENV_NAME: rx.url})
    assert len(rx.requests) == 1
    got = rx.requests[0]
    assert got["path"] == f"/hooks/{TOKEN}?key={QUERY_KEY}" and got["content_type"] == "application/json"
    body = json.loads(got["body"])
    assert body["alert"]["kind"] == "skew_shift" and body["alert"]["value"] == 0.62
    assert body["text"].startswith("[tarewise warning] skew_shift on 2024-03-21")
    web = final["delivery"]["webhook"]
    assert web == {"target": "http://127.0.0.1", "outcome": "ok", "attempts": 1}
    # history: a pending record, then the final one
    phases = [(r["alert_id"], r["phase"]) for r in read_history(ws)]
    assert phases == [("skew_shift-2024-03-21", "pending"), ("skew_shift-2024-03-21", "final")]
    _no_secret(ws.alerts.read_text())
    # httpx logged the request (at INFO) but with the URL rewritten
    httpx_lines = [r.getMessage() for r in all_logs.records if r.name == "httpx"]
    assert httpx_lines and all("<redacted>" in line for line in httpx_lines)
    _no_secret(all_logs.text)
    out = capsys.readouterr()
    _no_secret(out.out + out.err)


def test_receiver_returning_500_is_retried_then_recorded_as_failed(ws, all_logs):
    cfg = _cfg(retries=2)
    with Receiver(status=500) as rx:
        [final] = deliver_alerts(ws, [_alert()], cfg, env={ENV_NAME: rx.url})  # must not raise
    assert len(rx.requests) == 3  # 1 + alerts.retries
    assert final["delivery"]["webhook"] == {"target": "http://127.0.0.1", "outcome": "failed", "attempts": 3,
                                            "error": "HTTP 500"}
    [kept] = night_alerts(ws, "2024-03-21")
    assert kept["phase"] == "final" and kept["explanation"].startswith("Selection skew moved")
    _no_secret(ws.alerts.read_text())
    _no_secret(all_logs.text)


def test_receiver_down_does_not_raise_and_keeps_the_alert(ws, all_logs, capsys):
    [final] = deliver_alerts(ws, [_alert()], _cfg(retries=1), env={ENV_NAME: _closed_port_url()})
    web = final["delivery"]["webhook"]
    assert web["outcome"] == "failed" and web["attempts"] == 2 and "ConnectError" in web["error"]
    assert [r["phase"] for r in read_history(ws)] == ["pending", "final"]
    _no_secret(ws.alerts.read_text())
    _no_secret(all_logs.text)
    out = capsys.readouterr()
    _no_secret(out.out + out.err)


def test_client_error_is_not_retried(ws):
    with Receiver(status=404) as rx:
        [final] = deliver_alerts(ws, [_alert()], _cfg(retries=3), env={ENV_NAME: rx.url})
    assert len(rx.requests) == 1 and final["delivery"]["webhook"]["error"] == "HTTP 404"


def test_folded_alert_is_recorded_not_resent(ws):
    with Receiver() as rx:
        [final] = deliver_alerts(ws, [_alert("2024-03-22", status="ongoing", count=2)], _cfg(),
                                 env={ENV_NAME: rx.url})
    assert rx.requests == []
    assert final["delivery"]["webhook"]["outcome"] == "suppressed"
    assert final["count"] == 2 and final["first_date"] == "2024-03-21" and final["last_date"] == "2024-03-22"


def test_rerun_retries_only_what_failed(ws):
    cfg = _cfg(retries=0)
    with Receiver(status=500) as rx:
        deliver_alerts(ws, [_alert()], cfg, env={ENV_NAME: rx.url})
        rx.status = 200
        [second] = deliver_alerts(ws, [_alert()], cfg, env={ENV_NAME: rx.url})
        [third] = deliver_alerts(ws, [_alert()], cfg, env={ENV_NAME: rx.url})
    assert len(rx.requests) == 2  # failed try, successful retry on the re-run, nothing on the third run
    assert second["delivery"]["webhook"]["outcome"] == "ok"
    assert third["delivery"]["webhook"]["reason"] == "delivered on an earlier run of this night"


def test_without_receivers_the_history_still_gets_the_alert(ws):
    [final] = deliver_alerts(ws, [_alert()], _cfg(), env={})
    assert final["delivery"]["webhook"] == {"outcome": "not_configured",
                                            "reason": f"environment variable {ENV_NAME} is not set"}
    # outside a Prefect run the event is skipped (or sent, when a test session exposes an API)
    assert final["delivery"]["event"]["outcome"] in {"skipped", "ok"}
    assert final["delivery"]["blocks"] == {}


def test_bad_block_name_is_recorded_not_raised(ws):
    [final] = deliver_alerts(ws, [_alert()], _cfg(prefect_blocks=("no-slash-here",)), env={})
    out = final["delivery"]["blocks"]["no-slash-here"]
    assert out["outcome"] == "failed" and "alerts.prefect_blocks" in out["error"]


def test_torn_history_line_is_skipped_and_later_records_survive(ws, caplog):
    append_history(ws, {"alert_id": "a-1", "run_date": "2024-03-20", "phase": "final"})
    with ws.alerts.open("a") as fh:
        fh.write('{"alert_id": "a-2", "run_da')  # a crash mid-write
    append_history(ws, {"alert_id": "a-3", "run_date": "2024-03-21", "phase": "final"})
    with caplog.at_level(logging.WARNING, logger="tarewise.alerts"):
        ids = [r["alert_id"] for r in read_history(ws)]
    assert ids == ["a-1", "a-3"]
    assert f"{ws.alerts} line 2" in caplog.text


def test_redact_url():
    assert redact_url("https://user:pw@hooks.example.org:8443/t/abc?x=1") == "https://hooks.example.org"
    assert redact_url("not a url") == "?://?"


def test_raise_alerts_end_to_end_from_stored_metrics(ws, cfg):
    for day in range(1, 11):
        write_night_metrics(ws, {"run_date": f"2024-03-{day:02d}", "skew_mean_shift": 0.30 + 0.01 * (day % 3),
                                 "skew_w1": 0.35, "probe_coverage": 0.03, "active_users": 900})
    assert raise_alerts(ws, "2024-03-10", cfg, env={}) == []
    write_night_metrics(ws, {"run_date": "2024-03-11", "skew_mean_shift": 0.9, "skew_w1": 0.95,
                             "probe_coverage": 0.03, "active_users": 900})
    [rec] = raise_alerts(ws, "2024-03-11", cfg, env={})
    assert (rec["kind"], rec["status"], rec["alert_id"]) == ("skew_shift", "new", "skew_shift-2024-03-11")
    # a re-run of the same night keeps one episode and one count
    [again] = raise_alerts(ws, "2024-03-11", cfg, env={})
    assert (again["alert_id"], again["count"]) == ("skew_shift-2024-03-11", 1)
    assert len(night_alerts(ws, "2024-03-11")) == 1


def test_rerun_that_no_longer_alerts_withdraws_the_earlier_alert(ws, cfg):
    for day in range(1, 11):
        write_night_metrics(ws, {"run_date": f"2024-03-{day:02d}", "skew_mean_shift": 0.30 + 0.01 * (day % 3),
                                 "skew_w1": 0.35, "probe_coverage": 0.03, "active_users": 900})
    write_night_metrics(ws, {"run_date": "2024-03-11", "skew_mean_shift": 0.9, "skew_w1": 0.95,
                             "probe_coverage": 0.03, "active_users": 900})
    [rec] = raise_alerts(ws, "2024-03-11", cfg, env={})
    assert [a["alert_id"] for a in night_alerts(ws, "2024-03-11")] == [rec["alert_id"]]
    # corrected logs: the same night re-run is ordinary now
    write_night_metrics(ws, {"run_date": "2024-03-11", "skew_mean_shift": 0.31, "skew_w1": 0.35,
                             "probe_coverage": 0.03, "active_users": 900})
    assert raise_alerts(ws, "2024-03-11", cfg, env={}) == []
    assert night_alerts(ws, "2024-03-11") == []
    assert read_history(ws)[-1]["phase"] == "withdrawn"
    # and the withdrawn night does not make the next night's alert an "ongoing" one
    write_night_metrics(ws, {"run_date": "2024-03-12", "skew_mean_shift": 0.9, "skew_w1": 0.95,
                             "probe_coverage": 0.03, "active_users": 900})
    [nxt] = raise_alerts(ws, "2024-03-12", cfg, env={})
    assert (nxt["status"], nxt["alert_id"], nxt["count"]) == ("new", "skew_shift-2024-03-12", 1)


def test_backfill_night_alerts_are_recorded_not_sent_unless_configured(ws):
    for day in range(1, 11):
        write_night_metrics(ws, {"run_date": f"2024-03-{day:02d}", "skew_mean_shift": 0.30 + 0.01 * (day % 3),
                                 "skew_w1": 0.35, "probe_coverage": 0.03, "active_users": 900})
    write_night_metrics(ws, {"run_date": "2024-03-11", "skew_mean_shift": 0.9, "skew_w1": 0.95,
                             "probe_coverage": 0.03, "active_users": 900})
    with Receiver() as rx:
        [rec] = raise_alerts(ws, "2024-03-11", _cfg(), env={ENV_NAME: rx.url}, kind="backfill")
        assert rx.requests == []                            # the replay paged nobody
        assert rec["status"] == "new" and rec["delivery"]["webhook"]["outcome"] == "record_only"
        assert rec["delivery"]["event"]["outcome"] == "record_only"
        assert night_alerts(ws, "2024-03-11")               # but the history and report have it
        [sent] = raise_alerts(ws, "2024-03-11", _cfg(backfill_delivery="send"), env={ENV_NAME: rx.url},
                              kind="backfill")
        assert len(rx.requests) == 1 and sent["delivery"]["webhook"]["outcome"] == "ok"


def test_prefect_block_by_name_and_event_inside_a_flow(ws, prefect_harness):
    from prefect import flow
    from prefect.blocks.notifications import CustomWebhookNotificationBlock

    with Receiver() as rx:
        # The block keeps its own URL inside Prefect; 127.0.0.1 needs allow_private_urls.
        CustomWebhookNotificationBlock(name="tarewise-ops", url=rx.url, allow_private_urls=True,
                                       json_data={"text": "{{subject}}: {{body}}"}).save("tarewise-ops",
                                                                                         overwrite=True)
        cfg = _cfg(prefect_blocks=("custom-webhook/tarewise-ops", "custom-webhook/not-saved"))

        @flow
        def deliver_in_a_flow() -> list[dict]:
            return deliver_alerts(ws, [_alert()], cfg, env={})

        [final] = deliver_in_a_flow()
    blocks = final["delivery"]["blocks"]
    assert blocks["custom-webhook/tarewise-ops"] == {"outcome": "ok", "attempts": 1}
    missing = blocks["custom-webhook/not-saved"]
    assert missing["outcome"] == "failed" and missing["attempts"] == 1  # not found: not retried
    assert len(rx.requests) == 1
    assert json.loads(rx.requests[0]["body"])["text"].startswith("tarewise warning: skew_shift: [tarewise warning]")
    assert final["delivery"]["event"]["outcome"] == "ok" and final["delivery"]["event"]["event_id"]
