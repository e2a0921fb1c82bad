"""Alert history and delivery: JSONL history, a Prefect event, a JSON webhook, Prefect notification blocks.

Every alert is first appended to the history (``ws.alerts``, one JSON object per line) with
``phase: "pending"``, then delivered, then appended again with ``phase: "final"`` and the outcome of
each receiver. A crash between the two leaves the pending record, so nothing is lost, and a re-run of
the night retries only the receivers that did not succeed. Delivery never raises.

Receivers of an alert whose status is "new" (first night of an episode, see ``alert_rules``):

- a Prefect event ``tarewise.alert.<kind>`` (sent inside a Prefect run, or when ``PREFECT_API_URL``
  is set; outside both it is skipped rather than starting a temporary API server just for it);
- a generic JSON webhook, URL read from the environment variable named by
  ``alerts.webhook_url_env`` (never from a config file);
- each Prefect notification block named in ``alerts.prefect_blocks`` as ``<block-type-slug>/<name>``.

"ongoing" alerts (folded by the cool-down) are recorded but not sent again. When a re-run of a night
(e.g. on corrected logs) no longer raises an alert that night had raised, a ``withdrawn`` record is
appended: reports, ``tarewise status`` and the episode logic stop counting it (receivers that were
already notified get no retraction). Alerts of backfill and
sweep nights are recorded but not sent unless ``alerts.backfill_delivery = "send"``: replaying a
season of history would otherwise page people with a burst of stale alerts.

Secrets: the webhook URL may carry a token in its path or query, so the history and logs only ever
show ``scheme://host``; error messages are scrubbed of the URL and its parts; httpx's own request log
line, which prints the full URL, is rewritten while a webhook call is in flight.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from datetime import datetime, timezone
from urllib.parse import urlsplit

import httpx

from tasks.config import Config
from tasks.monitor.alert_rules import WITHDRAWN, Alert, evaluate_alerts, fold_alerts
from tasks.monitor.metrics_store import night_row, read_metrics
from tasks.workspace import Workspace

_log = logging.getLogger("tarewise.alerts")

OK = "ok"
FAILED = "failed"
SKIPPED = "skipped"
NOT_CONFIGURED = "not_configured"
SUPPRESSED = "suppressed"
RECORD_ONLY = "record_only"
#: HTTP statuses worth retrying; other 4xx mean the request itself is wrong and will stay wrong.
_RETRY_STATUSES = {408, 425, 429}


# --------------------------------------------------------------------------------------------------
# History
# --------------------------------------------------------------------------------------------------

def read_history(ws: Workspace) -> list[dict]:
    """Every history record in file order. A line that is not JSON (a torn last write) is skipped
    with a warning naming the file and line; the rest is still returned."""
    path = ws.alerts
    if not path.exists():
        return []
    out = []
    with path.open("r", encoding="utf-8") as fh:
        for lineno, line in enumerate(fh, start=1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except json.JSONDecodeError as exc:
                _log.warning("alert history %s line %d is not JSON (%s); skipped", path, lineno, exc.msg)
                continue
            if isinstance(rec, dict):
                out.append(rec)
            else:
                _log.warning("alert history %s line %d is not a JSON object; skipped", path, lineno)
    return out


def night_alerts(ws: Workspace, run_date: str, history: Sequence[Mapping] | None = None) -> list[dict]:
    """The latest record of each alert raised on ``run_date`` (in first-recorded order), leaving out
    alerts that a later re-run of the night withdrew."""
    records = read_history(ws) if history is None else history
    latest: dict[str, dict] = {}
    for rec in records:
        if rec.get("run_date") == run_date and rec.get("alert_id"):
            latest[str(rec["alert_id"])] = dict(rec)
    return [rec for rec in latest.values() if rec.get("phase") != WITHDRAWN]


def withdraw_stale(ws: Workspace, run_date: str, raised: Sequence[Alert]) -> list[dict]:
    """A re-run of ``run_date`` (e.g. on corrected logs) that no longer raises an alert the night had
    raised before: append a ``withdrawn`` record for it, so the report, ``status`` and the episode logic
    stop counting it. Receivers already notified are not sent a retraction. Returns the new records."""
    keep = {a.alert_id for a in raised}
    out = []
    for rec in night_alerts(ws, run_date):
        if str(rec["alert_id"]) not in keep:
            gone = {**rec, "phase": WITHDRAWN, "recorded_at": _now(),
                    "reason": "a re-run of this night no longer raises it"}
            append_history(ws, gone)
            out.append(gone)
            _logger().info("alert %s of %s withdrawn: a re-run no longer raises it", rec["alert_id"], run_date)
    return out


def append_history(ws: Workspace, record: Mapping) -> None:
    """Append one record as a JSON line and fsync it (the history is append-only)."""
    path = ws.alerts
    path.parent.mkdir(parents=True, exist_ok=True)
    line = json.dumps(record, sort_keys=True, allow_nan=False, default=str)
    with path.open("ab") as fh:
        # A torn last line (crash mid-write) must not swallow this record.
        if fh.tell() > 0:
            with path.open("rb") as rd:
                rd.seek(-1, os.SEEK_END)
                if rd.read(1) != b"\n":
                    fh.write(b"\n")
        fh.write(line.encode("utf-8") + b"\n")
        fh.flush()
        os.fsync(fh.fileno())


# --------------------------------------------------------------------------------------------------
# Secret hygiene
# --------------------------------------------------------------------------------------------------

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


def _describe_error(exc: BaseException, secrets: Sequence[str]) -> str:
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
def _redacting_http_logs(secrets: Sequence[str]) -> Iterator[None]:
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


# --------------------------------------------------------------------------------------------------
# Receivers
# --------------------------------------------------------------------------------------------------

def _with_retries(call: Callable[[], None], retries: int, delay: float, secrets: Sequence[str],
                  give_up: Callable[[BaseException], bool]) -> dict:
    attempts, error = 0, ""
    for attempt in range(retries + 1):
        attempts = attempt + 1
        try:
            call()
            return {"outcome": OK, "attempts": attempts}
        except Exception as exc:  # noqa: BLE001 - delivery must never raise
            error = _describe_error(exc, secrets)
            if give_up(exc) or attempt == retries:
                break
            time.sleep(delay)
    return {"outcome": FAILED, "attempts": attempts, "error": error}


def _http_give_up(exc: BaseException) -> bool:
    if isinstance(exc, httpx.HTTPStatusError):
        code = exc.response.status_code
        return 400 <= code < 500 and code not in _RETRY_STATUSES
    return False


def _summary_line(rec: Mapping) -> str:
    return f"[tarewise {rec['severity']}] {rec['kind']} on {rec['run_date']}: {rec['explanation']}"


def send_webhook(url: str, rec: Mapping, cfg: Config) -> dict:
    """POST the alert as JSON to ``url`` with retries; returns the (redacted) outcome. Never raises."""
    secrets = _secret_fragments(url)
    body = {"source": "tarewise", "text": _summary_line(rec), "alert": dict(rec)}

    def call() -> None:
        with httpx.Client(timeout=cfg.alerts.timeout_seconds, follow_redirects=False) as client:
            client.post(url, json=body).raise_for_status()

    with _redacting_http_logs(secrets):
        result = _with_retries(call, cfg.alerts.retries, cfg.alerts.retry_delay_seconds, secrets, _http_give_up)
    return {"target": redact_url(url), **result}


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
        guard = block.raise_on_failure() if hasattr(block, "raise_on_failure") else contextlib.nullcontext()
        with guard:
            block.notify(_summary_line(rec), subject=f"tarewise {rec['severity']}: {rec['kind']}")

    def give_up(exc: BaseException) -> bool:
        # A missing block or a block of the wrong type stays wrong on retry.
        return isinstance(exc, (ValueError, TypeError, KeyError)) and not isinstance(exc, httpx.HTTPError)

    secrets: list[str] = []
    with _redacting_http_logs(secrets):
        return _with_retries(call, cfg.alerts.retries, cfg.alerts.retry_delay_seconds, secrets, give_up)


def _in_prefect_run() -> bool:
    from prefect.context import FlowRunContext, TaskRunContext
    return FlowRunContext.get() is not None or TaskRunContext.get() is not None


def _api_url() -> str | None:
    from prefect.settings import get_current_settings
    return get_current_settings().api.url


def send_event(rec: Mapping) -> dict:
    """Emit the Prefect event ``tarewise.alert.<kind>``. Never raises."""
    try:
        if not (_in_prefect_run() or _api_url()):
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
        return {"outcome": FAILED, "error": _describe_error(exc, [])}
    if event is None:
        return {"outcome": SKIPPED, "reason": "this Prefect client does not emit events"}
    return {"outcome": OK, "event_id": str(event.id)}


# --------------------------------------------------------------------------------------------------
# Orchestration of one night's alerts
# --------------------------------------------------------------------------------------------------

def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _earlier_success(history: Sequence[Mapping], alert_id: str, run_date: str) -> dict[str, bool]:
    """Which receivers already succeeded for this alert on this night (earlier runs)."""
    done: dict[str, bool] = {}
    for rec in history:
        if rec.get("alert_id") != alert_id or rec.get("run_date") != run_date or rec.get("phase") != "final":
            continue
        d = rec.get("delivery") or {}
        if (d.get("event") or {}).get("outcome") == OK:
            done["event"] = True
        if (d.get("webhook") or {}).get("outcome") == OK:
            done["webhook"] = True
        for name, out in (d.get("blocks") or {}).items():
            if (out or {}).get("outcome") == OK:
                done[f"block:{name}"] = True
    return done


def _logger() -> logging.Logger | logging.LoggerAdapter:
    try:
        if _in_prefect_run():
            from prefect.logging import get_run_logger
            return get_run_logger()
    except Exception:  # noqa: BLE001 - logging must not break delivery
        pass
    return _log


def deliver_alerts(ws: Workspace, alerts: Sequence[Alert], cfg: Config,
                   env: Mapping[str, str] | None = None, send: bool = True) -> list[dict]:
    """Record and deliver folded alerts (see module docstring). Returns the final history records.

    ``env``: where the webhook URL variable is looked up (default ``os.environ``). ``send=False``
    records every alert with outcome ``record_only`` and contacts no receiver. Never raises for
    a delivery problem; only a failure to write the history file itself propagates (then there is
    nowhere to keep the alert, and the run should fail loudly).
    """
    env = os.environ if env is None else env
    url = (env.get(cfg.alerts.webhook_url_env) or "").strip()
    history = read_history(ws)
    log = _logger()
    finals = []
    for alert in alerts:
        rec = {**alert.to_record(), "recorded_at": _now()}
        append_history(ws, {**rec, "phase": "pending", "delivery": {}})
        delivery: dict[str, object] = {}
        if not send:
            note = {"outcome": RECORD_ONLY, "reason": "not sent: backfill or sweep night "
                                                      "(alerts.backfill_delivery = \"record\")"}
            delivery = {"event": note, "webhook": note, "blocks": {n: note for n in cfg.alerts.prefect_blocks}}
        elif alert.status != "new":
            note = {"outcome": SUPPRESSED, "reason": f"cool-down: folded into {alert.alert_id} "
                                                     f"(night {alert.count} since {alert.first_date})"}
            delivery = {"event": note, "webhook": note, "blocks": {n: note for n in cfg.alerts.prefect_blocks}}
        else:
            done = _earlier_success(history, alert.alert_id, alert.run_date)
            again = {"outcome": OK, "reason": "delivered on an earlier run of this night"}
            delivery["event"] = again if done.get("event") else send_event(rec)
            if not url:
                delivery["webhook"] = {"outcome": NOT_CONFIGURED,
                                       "reason": f"environment variable {cfg.alerts.webhook_url_env} is not set"}
            elif done.get("webhook"):
                delivery["webhook"] = {"target": redact_url(url), **again}
            else:
                delivery["webhook"] = send_webhook(url, rec, cfg)
            delivery["blocks"] = {name: again if done.get(f"block:{name}") else send_block(name, rec, cfg)
                                  for name in cfg.alerts.prefect_blocks}
        final = {**rec, "phase": "final", "delivery": delivery, "recorded_at": _now()}
        append_history(ws, final)
        finals.append(final)
        log.log(logging.WARNING if alert.severity != "info" else logging.INFO,
                "alert %s (%s, %s): %s | %s", alert.alert_id, alert.severity, alert.status,
                alert.explanation, _delivery_summary(delivery))
    return finals


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


def raise_alerts(ws: Workspace, run_date: str, cfg: Config, env: Mapping[str, str] | None = None,
                 kind: str = "nightly") -> list[dict]:
    """Evaluate tonight's stored metrics row against the stored series, fold by cool-down, record and
    deliver (``kind`` is the run's kind: only "nightly" runs send unless ``alerts.backfill_delivery`` says
    "send"). Call after ``metrics_store.write_night_metrics``. Returns the final history records."""
    tonight = night_row(ws, run_date)
    series = read_metrics(ws)
    raw = evaluate_alerts(tonight, series, cfg)
    folded = fold_alerts(raw, read_history(ws), run_date, cfg.drift.cooldown_nights)
    withdraw_stale(ws, run_date, folded)
    send = kind == "nightly" or cfg.alerts.backfill_delivery == "send"
    return deliver_alerts(ws, folded, cfg, env=env, send=send)
