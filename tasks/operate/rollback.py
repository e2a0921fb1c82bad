"""Putting an earlier version back (``tarewise rollback``): an atomic switch of the live pointer,
recorded in the run ledger."""

from __future__ import annotations

from datetime import datetime
from zoneinfo import ZoneInfo

from tasks import ledger
from tasks.lock import workspace_lock
from tasks.publish import versions
from tasks.workspace import Workspace


class RollbackError(ValueError):
    """The rollback target is not a published version (the message lists what exists)."""


def rollback(ws: Workspace, to: str, reason: str, timezone: str, stale_seconds: float) -> dict:
    """Make the published version ``to`` live again, under the workspace lock, recorded in the run
    ledger as kind ``rollback`` (run date: today in ``timezone``). The switch is one atomic replace of
    ``live.json`` (``versions.set_live``). Returns ``{"previous", "live", "run_id", "state_before",
    "damaged_pointer"}``; ``run_id`` is None when ``to`` was already live (nothing recorded).

    A target with missing or changed files, or a model that does not load, is refused (naming the
    damage). A damaged ``live.json`` is what a rollback repairs: ``previous`` is then ``"unknown"`` and
    ``damaged_pointer`` names where the damaged file was kept."""
    known = {m["version_id"]: m for m in versions.list_versions(ws)}
    if to not in known:
        listing = ", ".join(list(known)[-10:]) or "none"
        raise RollbackError(f"no version {to!r} in {ws.versions}; latest published: {listing}")
    damage = versions.version_problems(ws, to) or [p for p in (versions.load_checkpoint_checked(ws, to)[1],) if p]
    if damage:
        raise RollbackError(f"version {to} is damaged, refusing to make it live: {'; '.join(damage)}")
    today = datetime.now(ZoneInfo(timezone)).date().isoformat()
    with workspace_lock(ws.lock, f"rollback to {to}", stale_seconds):
        try:
            previous = versions.live_version(ws)
        except versions.PointerDamaged:
            previous = "unknown"
        if previous == to:
            return {"previous": previous, "live": to, "run_id": None, "state_before": "live",
                    "damaged_pointer": None}
        note = f"live {previous or 'none'} -> {to}: {reason}"
        run_id = ledger.start_run(ws, "rollback", today, message=note)
        try:
            kept = versions.set_live(ws, to, reason=f"rollback: {reason}")
        except BaseException as exc:
            ledger.finish_run(ws, run_id, "failed", message=f"{note}; {type(exc).__name__}: {exc}")
            raise
        if kept:
            note += f" (replaced the damaged live pointer, kept at {kept})"
        ledger.finish_run(ws, run_id, "done", version_id=to, state="live", message=note)
    return {"previous": previous, "live": to, "run_id": run_id, "state_before": known[to]["state"],
            "damaged_pointer": kept}
