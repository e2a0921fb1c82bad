"""What is going on in a workspace (``tarewise status``): live version, lock, recent runs and alerts,
and what the workspace doctor (``doctor.py``) found. Plain functions over the ledger, versions, lock and
alert history; the CLI prints them. A damaged file never stops the rest from being shown: its section is
left empty and the doctor names the damage."""

from __future__ import annotations

import json
from typing import Callable, Iterable

import pandas as pd

from tasks import ledger
from tasks import dates
from tasks.dates import shift
from tasks.lock import is_stale, read_lock
from tasks.monitor.alert_history import latest_by_night, read_history
from tasks.operate import doctor
from tasks.operate.approval import awaiting
from tasks.operate.retention import default_as_of
from tasks.publish import versions
from tasks.workspace import Workspace


def _seconds(started: object, finished: object, durations_json: object) -> float | None:
    """Wall time when both ends are recorded, else the sum of recorded stage durations."""
    if pd.notna(started) and pd.notna(finished):
        return round((pd.Timestamp(finished) - pd.Timestamp(started)).total_seconds(), 1)
    try:
        d = json.loads(durations_json) if isinstance(durations_json, str) and durations_json else {}
    except json.JSONDecodeError:
        return None
    return round(sum(float(v) for v in d.values()), 1) if d else None


def recent_runs(ws: Workspace, n: int, stale_seconds: float) -> list[dict]:
    """The ``n`` latest ledger rows, newest first. A ``running`` row is shown as ``interrupted`` when no
    live process holds the workspace lock (its process died; the next backfill marks it so)."""
    df = ledger.read_ledger(ws)
    if df.empty:
        return []
    holder = read_lock(ws.lock)
    running_now = holder is not None and not is_stale(holder, stale_seconds)
    rows = []
    for _, r in df.sort_values("started_at", ascending=False, kind="stable").head(n).iterrows():
        status = r["status"]
        if status == "running" and not running_now:
            status = "interrupted"
        rows.append({"run_id": r["run_id"], "kind": r["kind"], "run_date": r["run_date"], "status": status,
                     "version_id": r["version_id"] if isinstance(r["version_id"], str) else "",
                     "state": r["state"] if isinstance(r["state"], str) else "",
                     "started_at": pd.Timestamp(r["started_at"]).strftime("%Y-%m-%d %H:%M:%S") if pd.notna(r["started_at"]) else "",
                     "seconds": _seconds(r["started_at"], r["finished_at"], r["durations_json"]),
                     "message": r["message"] if isinstance(r["message"], str) else ""})
    return rows


def live_summary(ws: Workspace) -> dict | None:
    """The live version's id, run date, method, held-out MAE and when/why it became live, or None."""
    pointer = versions.read_pointer(ws)
    vid = pointer.get("version_id")
    if vid is None:
        return None
    m = versions.read_manifest(ws, vid)
    since = next((h for h in reversed(pointer.get("history", [])) if h.get("version_id") == vid), {})
    cand = (m.get("metrics") or {}).get("candidate") or {}
    return {"version_id": vid, "run_date": m.get("run_date"), "method": m.get("method"), "kind": m.get("kind"),
            "mae": cand.get("mae"), "heldout": cand.get("n"), "since": since.get("at"), "reason": since.get("reason")}


def recent_alerts(ws: Workspace, as_of: str, days: int) -> list[dict]:
    """Alerts raised for run dates in ``(as_of - days, as_of]``: the latest record of each, oldest first."""
    first = shift(as_of, -days)
    latest = latest_by_night(read_history(ws), lambda run_date: first < run_date <= as_of)
    return sorted(latest, key=lambda r: (str(r.get("run_date")), str(r.get("recorded_at", ""))))


def awaiting_summary(ws: Workspace) -> list[dict]:
    """Versions awaiting approval, newest first: id, run date, held-out MAE of the candidate and of what
    the gate compared it with, and the gate's reason."""
    out = []
    for m in awaiting(ws):
        metrics, gate = m.get("metrics") or {}, m.get("gate") or {}
        other = metrics.get(gate.get("compared_to", "")) or {}
        out.append({"version_id": m["version_id"], "run_date": m.get("run_date"),
                    "mae": (metrics.get("candidate") or {}).get("mae"), "compared_to": gate.get("compared_to"),
                    "baseline_mae": other.get("mae"), "reason": gate.get("reason", "")})
    return out


def _or(name: str, section: Callable[[], object], fallback: object, skipped: dict[str, str]) -> object:
    """A section's value, or ``fallback`` when it cannot be read; then ``skipped[name]`` says why (the
    doctor names the damaged file and its fix)."""
    try:
        return section()
    except Exception as exc:  # noqa: BLE001 - status shows what it can, and says what it could not
        skipped[name] = f"{type(exc).__name__}: {exc}"
        return fallback


def status(ws: Workspace, timezone: str, stale_seconds: float, runs: int = 10, days: int = 7,
           extra_checks: Iterable[Callable[[], list[doctor.Finding]]] = ()) -> dict:
    """Everything ``tarewise status`` shows. ``as_of`` (for "the last week") is the newest completed run
    date, so a workspace replaying old history shows that history's alerts. ``live`` is the string
    ``"unknown"`` when the pointer or the live manifest cannot be read. ``skipped``: section -> why it
    could not be read. ``awaiting``: versions awaiting a person's approval (``approval.awaiting``),
    newest first. ``findings``: the doctor's (:func:`tasks.operate.doctor.diagnose`, with ``extra_checks``)."""
    holder = read_lock(ws.lock)
    lock = None
    if holder is not None or ws.lock.exists():
        lock = {**(holder or {}), "stale": is_stale(holder, stale_seconds)}
    skipped: dict[str, str] = {}
    today = dates.today(timezone)
    as_of = _or("as_of", lambda: default_as_of(ws, timezone), today, skipped)
    return {"workspace": str(ws.root), "live": _or("live", lambda: live_summary(ws), "unknown", skipped),
            "lock": lock, "runs": _or("runs", lambda: recent_runs(ws, runs, stale_seconds), [], skipped),
            "as_of": as_of, "days": days, "alerts": _or("alerts", lambda: recent_alerts(ws, as_of, days), [], skipped),
            "awaiting": _or("awaiting", lambda: awaiting_summary(ws), [], skipped),
            "skipped": skipped, "findings": doctor.diagnose(ws, stale_seconds, extra_checks)}
