"""The alert history: one JSON object per line at ``ws.alerts``, append-only.

Each alert of a night is recorded twice: ``phase: "pending"`` before delivery, ``phase: "final"`` with
each receiver's outcome after it (a crash between the two leaves the pending record, so nothing is lost
and a re-run retries only the receivers that did not succeed). A re-run of a night that no longer raises
an alert that night had raised appends a ``withdrawn`` record for it (``alert_rules.WITHDRAWN``).

Outcomes a receiver can have in a record's ``delivery``: see the constants below.
"""

from __future__ import annotations

import json
import logging
import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone

from tasks.monitor.alert_rules import WITHDRAWN, Alert
from tasks.workspace import Workspace

_log = logging.getLogger("tarewise.alerts")

PENDING = "pending"
FINAL = "final"

OK = "ok"
FAILED = "failed"
SKIPPED = "skipped"
NOT_CONFIGURED = "not_configured"
SUPPRESSED = "suppressed"
RECORD_ONLY = "record_only"


def now() -> str:
    """The ``recorded_at`` stamp: UTC, to the second."""
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


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


def append_history(ws: Workspace, record: Mapping) -> dict:
    """Append one record as a JSON line and fsync it. Returns the record as :func:`read_history` will
    read it back (JSON types, keys sorted)."""
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
    return json.loads(line)


def latest_by_night(records: Sequence[Mapping], keep: Callable[[str], bool]) -> list[dict]:
    """The latest record of each (alert, run date) whose run date passes ``keep``, in first-recorded
    order, leaving out alerts that a later re-run of their night withdrew."""
    latest: dict[tuple[str, str], dict] = {}
    for rec in records:
        run_date = str(rec.get("run_date", ""))
        if rec.get("alert_id") and keep(run_date):
            latest[(str(rec["alert_id"]), run_date)] = dict(rec)
    return [rec for rec in latest.values() if rec.get("phase") != WITHDRAWN]


def night_alerts(records: Sequence[Mapping], run_date: str) -> list[dict]:
    """The latest record of each alert raised on ``run_date`` and not withdrawn (see :func:`latest_by_night`)."""
    return latest_by_night(records, lambda d: d == run_date)


@dataclass
class AlertHistory:
    """The history file and its records, read once and kept in step with every record appended."""

    ws: Workspace
    records: list[dict]

    @classmethod
    def read(cls, ws: Workspace) -> AlertHistory:
        return cls(ws, read_history(ws))

    def append(self, record: Mapping) -> dict:
        """:func:`append_history`, and keep the record as read back."""
        rec = append_history(self.ws, record)
        self.records.append(rec)
        return rec

    def withdraw_stale(self, run_date: str, raised: Sequence[Alert]) -> list[dict]:
        """A re-run of ``run_date`` (e.g. on corrected logs) that no longer raises an alert the night had
        raised before: append a ``withdrawn`` record for it, so the report, ``status`` and the episode
        logic stop counting it. Receivers already notified get no retraction. Returns the new records."""
        keep = {a.alert_id for a in raised}
        return [self.append({**rec, "phase": WITHDRAWN, "recorded_at": now(),
                             "reason": "a re-run of this night no longer raises it"})
                for rec in night_alerts(self.records, run_date) if str(rec["alert_id"]) not in keep]

    def delivered_before(self, alert_id: str, run_date: str) -> set[str]:
        """Receivers that already succeeded for this alert on this night (earlier runs): "event",
        "webhook" and ``block:<name>``."""
        done: set[str] = set()
        for rec in self.records:
            if rec.get("alert_id") != alert_id or rec.get("run_date") != run_date or rec.get("phase") != FINAL:
                continue
            d = rec.get("delivery") or {}
            for key in ("event", "webhook"):
                if (d.get(key) or {}).get("outcome") == OK:
                    done.add(key)
            done |= {f"block:{name}" for name, out in (d.get("blocks") or {}).items()
                     if (out or {}).get("outcome") == OK}
        return done
