"""The generic JSON webhook receiver, the retry loop every receiver shares, and secret hygiene.

The webhook URL is read from the environment variable named by ``alerts.webhook_url_env`` (never from a
config file) and may carry a token in its path or query, so the history and logs only ever show
``scheme://host``; error messages are scrubbed of the URL and its parts; httpx's own request log line,
which prints the full URL, is rewritten while a call is in flight. Nothing here raises for a delivery
problem: outcomes are returned as the dicts recorded in the alert history.
"""

from __future__ import annotations

import contextlib
import logging
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from urllib.parse import urlsplit

import httpx

from tasks.config import Config
from tasks.monitor.alert_history import FAILED, OK

#: HTTP statuses worth retrying; other 4xx mean the request itself is wrong and will stay wrong.
_RETRY_STATUSES = {408, 425, 429}


def redact_url(url: str) -> str:
    """``scheme://host`` of a URL: the only part of a receiver URL ever logged or recorded."""
    try:
        parts = urlsplit(url)
        host = parts.hostname or "?"
    except ValueError:
        return "<unparseable url>"
    return f"{parts.scheme or '?'}://{host}"


def _secret_fragments(url: str) -> list[str]:
    """Pieces of ``url`` that may carry a token (longest first), for scrubbing messages."""
    frags = {url, url.split("://", 1)[-1]}
    try:
        frags.add(str(httpx.URL(url)))  # the form httpx prints, which may normalise escapes
    except Exception:  # noqa: BLE001 - an unparseable URL has no other form to hide
        pass
    try:
        p = urlsplit(url)
    except ValueError:
        return sorted(frags, key=len, reverse=True)
    for f in (p.path, p.query, p.fragment, p.username or "", p.password or "", p.netloc,
              p.path + ("?" + p.query if p.query else "")):
        if f and f not in ("/",) and len(f) >= 4:
            frags.add(f)
    return sorted(frags, key=len, reverse=True)


def _scrub(text: str, secrets: Sequence[str]) -> str:
    for s in secrets:
        if s:
            text = text.replace(s, "<redacted>")
    return text


def describe_error(exc: BaseException, secrets: Sequence[str]) -> str:
    """One line for the history: the HTTP status, a timeout, or the exception with ``secrets`` removed."""
    if isinstance(exc, httpx.HTTPStatusError):
        return f"HTTP {exc.response.status_code}"
    if isinstance(exc, httpx.TimeoutException):
        return f"timeout ({type(exc).__name__})"
    return _scrub(f"{type(exc).__name__}: {exc}", secrets)[:300]


class _RedactFilter(logging.Filter):
    def __init__(self, secrets: Sequence[str]):
        super().__init__()
        self.secrets = [s for s in secrets if s]

    def filter(self, record: logging.LogRecord) -> bool:
        msg = record.getMessage()
        clean = _scrub(msg, self.secrets)
        if clean != msg:
            record.msg, record.args = clean, ()
        return True


@contextlib.contextmanager
def redacting_http_logs(secrets: Sequence[str]) -> Iterator[None]:
    """httpx logs every request with its full URL at INFO; rewrite such lines while we call out."""
    filt = _RedactFilter(secrets)
    loggers = [logging.getLogger(n) for n in ("httpx", "httpcore")]
    for lg in loggers:
        lg.addFilter(filt)
    try:
        yield
    finally:
        for lg in loggers:
            lg.removeFilter(filt)


def with_retries(call: Callable[[], None], retries: int, delay: float, secrets: Sequence[str],
                 give_up: Callable[[BaseException], bool]) -> dict:
    """Run ``call`` up to ``retries + 1`` times, ``delay`` seconds apart, stopping early when ``give_up``
    says the error will not go away. Returns ``{"outcome", "attempts"[, "error"]}``; never raises."""
    attempts, error = 0, ""
    for attempt in range(retries + 1):
        attempts = attempt + 1
        try:
            call()
            return {"outcome": OK, "attempts": attempts}
        except Exception as exc:  # noqa: BLE001 - delivery must never raise
            error = describe_error(exc, secrets)
            if give_up(exc) or attempt == retries:
                break
            time.sleep(delay)
    return {"outcome": FAILED, "attempts": attempts, "error": error}


def _http_give_up(exc: BaseException) -> bool:
    if isinstance(exc, httpx.HTTPStatusError):
        code = exc.response.status_code
        return 400 <= code < 500 and code not in _RETRY_STATUSES
    return False


def summary_line(rec: Mapping) -> str:
    """The one-line text receivers show for an alert record."""
    return f"[tarewise {rec['severity']}] {rec['kind']} on {rec['run_date']}: {rec['explanation']}"


def send_webhook(url: str, rec: Mapping, cfg: Config) -> dict:
    """POST the alert as JSON to ``url`` with retries; returns the (redacted) outcome. Never raises."""
    secrets = _secret_fragments(url)
    body = {"source": "tarewise", "text": summary_line(rec), "alert": dict(rec)}

    def call() -> None:
        with httpx.Client(timeout=cfg.alerts.timeout_seconds, follow_redirects=False) as client:
            client.post(url, json=body).raise_for_status()

    with redacting_http_logs(secrets):
        result = with_retries(call, cfg.alerts.retries, cfg.alerts.retry_delay_seconds, secrets, _http_give_up)
    return {"target": redact_url(url), **result}
