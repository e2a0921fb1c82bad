"""The JSON webhook against a real HTTP server on 127.0.0.1 (tests/receivers.py): body, retries, and the
URL's secrets kept out of outcomes, logs and console."""

from __future__ import annotations

import json
import logging

import pytest

from receivers import QUERY_KEY, TOKEN, Receiver, closed_port_url, no_secret
from tasks.config import Config
from tasks.monitor.webhook import describe_error, redact_url, send_webhook, with_retries

RECORD = {"kind": "skew_shift", "severity": "warning", "run_date": "2024-03-21", "value": 0.62,
          "explanation": "Selection skew moved (invented numbers)."}


def _cfg(**alerts) -> Config:
    base = {"alerts.retries": 2, "alerts.retry_delay_seconds": 0.01, "alerts.timeout_seconds": 5.0}
    return Config().updated({**base, **{f"alerts.{k}": v for k, v in alerts.items()}})


@pytest.fixture
def all_logs(caplog):
    caplog.set_level(logging.DEBUG)
    for name in ("httpx", "httpcore", "tarewise"):
        caplog.set_level(logging.DEBUG, logger=name)
    return caplog


def test_posts_json_and_keeps_the_secret_out(all_logs, capsys):
    with Receiver() as rx:
        out = send_webhook(rx.url, RECORD, _cfg())
    assert out == {"target": "http://127.0.0.1", "outcome": "ok", "attempts": 1}
    [got] = rx.requests
    assert got["path"] == f"/hooks/{TOKEN}?key={QUERY_KEY}" and got["content_type"] == "application/json"
    body = json.loads(got["body"])
    assert body["alert"] == RECORD and body["source"] == "tarewise"
    assert body["text"] == "[tarewise warning] skew_shift on 2024-03-21: Selection skew moved (invented numbers)."
    # httpx logged the request (at INFO) but with the URL rewritten
    httpx_lines = [r.getMessage() for r in all_logs.records if r.name == "httpx"]
    assert httpx_lines and all("<redacted>" in line for line in httpx_lines)
    no_secret(all_logs.text)
    out = capsys.readouterr()
    no_secret(out.out + out.err)


def test_server_error_is_retried_then_failed():
    with Receiver(status=500) as rx:
        out = send_webhook(rx.url, RECORD, _cfg(retries=2))
    assert len(rx.requests) == 3  # 1 + alerts.retries
    assert out == {"target": "http://127.0.0.1", "outcome": "failed", "attempts": 3, "error": "HTTP 500"}


@pytest.mark.parametrize("status, tries", [(404, 1), (429, 4)])
def test_client_error_is_not_retried_but_too_many_requests_is(status, tries):
    with Receiver(status=status) as rx:
        out = send_webhook(rx.url, RECORD, _cfg(retries=3))
    assert len(rx.requests) == tries and out["error"] == f"HTTP {status}"


def test_receiver_down_is_an_outcome_without_the_url(all_logs):
    out = send_webhook(closed_port_url(), RECORD, _cfg(retries=1))
    assert out["outcome"] == "failed" and out["attempts"] == 2 and "ConnectError" in out["error"]
    no_secret(json.dumps(out))
    no_secret(all_logs.text)


def test_with_retries_stops_when_told_and_scrubs_messages():
    calls = []

    def call():
        calls.append(1)
        raise KeyError(f"no block at https://hooks.example.org/{TOKEN}")

    out = with_retries(call, retries=3, delay=0.0, secrets=[TOKEN], give_up=lambda e: isinstance(e, KeyError))
    assert len(calls) == 1 and out["outcome"] == "failed" and TOKEN not in out["error"]
    assert describe_error(ValueError(f"bad {TOKEN}"), [TOKEN]) == "ValueError: bad <redacted>"


def test_redact_url():
    assert redact_url("https://user:pw@hooks.example.org:8443/t/abc?x=1") == "https://hooks.example.org"
    assert redact_url("not a url") == "?://?"
