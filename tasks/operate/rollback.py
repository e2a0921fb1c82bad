"""Switching the live version by hand: putting an earlier version back (``tarewise rollback``), and the one
switch every such command shares (:func:`switch_live`, also used by ``approval.approve``): atomic,
under the workspace lock, recorded in the run ledger."""

from __future__ import annotations

from collections.abc import Callable
from datetime import datetime
from zoneinfo import ZoneInfo

from tasks import ledger
from tasks.lock import workspace_lock
from tasks.publish import versions
from tasks.workspace import Workspace


class RollbackError(ValueError):
    """The rollback target is not a published version (the message lists what exists)."""


def rollback(ws: Workspace, to: str, reason: str, timezone: str, stale_seconds: float) -> dict:
    """Make the published version ``to`` live again, recorded in the run ledger as kind ``rollback``
    (:func:`switch_live`). Returns what :func:`switch_live` returns; ``run_id`` is None when ``to`` was
    already live (nothing recorded)."""
    known = {m["version_id"]: m for m in versions.list_versions(ws)}
    if to not in known:
        listing = ", ".join(list(known)[-10:]) or "none"
        raise RollbackError(f"no version {to!r} in {ws.versions}; latest published: {listing}")
    out = switch_live(ws, to, "rollback", reason, timezone, stale_seconds, f"rollback: {reason}")
    return {**out, "state_before": known[to]["state"] if out["run_id"] else "live"}


def switch_live(ws: Workspace, to: str, kind: str, note: str, timezone: str, stale_seconds: float,
                pointer_reason: str, check: Callable[[str | None], None] | None = None) -> dict:
    """Make the published version ``to`` live under the workspace lock, recorded in the run ledger as
    ``kind`` (run date: today in ``timezone``; message ``live <previous> -> <to>: <note>``). The switch is
    one atomic replace of ``live.json`` (``versions.set_live``, with ``pointer_reason`` in its history).
    ``check(previous)`` runs under the lock first and raises to refuse. Returns ``{"previous", "live",
    "run_id", "damaged_pointer"}``; ``run_id`` is None when ``to`` was already live (nothing recorded).

    A target with missing or changed files, or a model that does not load, is refused (naming the
    damage). A damaged ``live.json`` is what a switch repairs: ``previous`` is then ``"unknown"`` and
    ``damaged_pointer`` names where the damaged file was kept."""
    damage = versions.version_problems(ws, to) or [p for p in (versions.load_checkpoint_checked(ws, to)[1],) if p]
    if damage:
        raise RollbackError(f"version {to} is damaged, refusing to make it live: {'; '.join(damage)}")
    today = datetime.now(ZoneInfo(timezone)).date().isoformat()
    with workspace_lock(ws.lock, f"{kind} to {to}", stale_seconds):
        try:
            previous = versions.live_version(ws)
        except versions.PointerDamaged:
            previous = "unknown"
        if check is not None:
            check(previous)
        if previous == to:
            return {"previous": previous, "live": to, "run_id": None, "damaged_pointer": None}
        message = f"live {previous or 'none'} -> {to}: {note}"
        run_id = ledger.start_run(ws, kind, today, message=message)
        try:
            kept = versions.set_live(ws, to, reason=pointer_reason)
        except BaseException as exc:
            ledger.finish_run(ws, run_id, "failed", message=f"{message}; {type(exc).__name__}: {exc}")
            raise
        if kept:
            message += f" (replaced the damaged live pointer, kept at {kept})"
        ledger.finish_run(ws, run_id, "done", version_id=to, state="live", message=message)
    return {"previous": previous, "live": to, "run_id": run_id, "damaged_pointer": kept}
