"""A person's review of candidates (``gate.require_approval``): which versions await approval, and
approving one (it becomes live) or rejecting it, each recorded in the run ledger.

With ``gate.require_approval`` the promotion gate holds a candidate that passed every rule, with the
reason "awaiting approval" (``gate.awaiting_approval`` in its manifest). Such a version **awaits
approval** while no approval or rejection of it is in the run ledger, it has never been live, and it is
newer than the live version: approving an older one would move the live version back in time, which is
what ``tarewise rollback`` is for. Versions are never edited; the review lives in the ledger (kinds
:data:`APPROVAL` and :data:`REJECTION`, the version id, who and why in the message).
"""

from __future__ import annotations

from datetime import datetime
from zoneinfo import ZoneInfo

from tasks import ledger
from tasks.lock import workspace_lock
from tasks.operate.rollback import switch_live
from tasks.publish import versions
from tasks.workspace import Workspace

APPROVAL, REJECTION = "approval", "rejection"


class ApprovalError(ValueError):
    """The version cannot be approved or rejected (the message says why and what awaits approval)."""


def reviews(ws: Workspace) -> dict[str, dict]:
    """The latest finished approval or rejection of each version: ``{version_id: {"kind", "message",
    "at"}}`` from the run ledger."""
    df = ledger.read_ledger(ws)
    df = df[df["kind"].isin([APPROVAL, REJECTION]) & (df["status"] == "done")]
    out: dict[str, dict] = {}
    for _, r in df.sort_values("started_at", kind="stable").iterrows():
        out[str(r["version_id"])] = {"kind": r["kind"], "message": r["message"], "at": str(r["finished_at"])}
    return out


def _newer(m: dict, than: dict | None) -> bool:
    key = lambda x: (x.get("run_date", ""), x.get("published_at", ""))  # noqa: E731
    return than is None or key(m) > key(than)


def awaiting(ws: Workspace) -> list[dict]:
    """Manifests (with ``state``, see ``versions.list_versions``) of the versions awaiting approval, newest
    first."""
    manifests = versions.list_versions(ws)
    live = next((m for m in manifests if m["state"] == "live"), None)
    done = reviews(ws)
    return [m for m in reversed(manifests)
            if (m.get("gate") or {}).get("awaiting_approval") and m["state"] == "held"
            and m["version_id"] not in done and _newer(m, live)]


def _check_awaiting(ws: Workspace, version_id: str, what: str) -> dict:
    waiting = {m["version_id"]: m for m in awaiting(ws)}
    if version_id in waiting:
        return waiting[version_id]
    why = "is not a published version"
    try:
        m = versions.read_manifest(ws, version_id)
        review = reviews(ws).get(version_id)
        if review:
            why = f"was already reviewed ({review['kind']}: {review['message']})"
        elif not (m.get("gate") or {}).get("awaiting_approval"):
            why = f"was not held for approval (gate: {(m.get('gate') or {}).get('reason', '?')})"
        else:
            why = "has been live already, or is older than the live version (`tarewise rollback` puts an older one back)"
    except versions.VersionError:
        pass
    listing = ", ".join(waiting) or "none"
    raise ApprovalError(f"cannot {what} {version_id}: it {why}; awaiting approval: {listing}")


def approve(ws: Workspace, version_id: str, reason: str, by: str, timezone: str, stale_seconds: float) -> dict:
    """Make a version awaiting approval live (``rollback.switch_live``), recorded as kind
    :data:`APPROVAL`. Returns ``{"previous", "live", "run_id", "damaged_pointer"}``."""
    _check_awaiting(ws, version_id, "approve")
    note = f"approved by {by}: {reason}"
    return switch_live(ws, version_id, APPROVAL, note, timezone, stale_seconds, note,
                       check=lambda previous: _check_awaiting(ws, version_id, "approve"))


def reject(ws: Workspace, version_id: str, reason: str, by: str, timezone: str, stale_seconds: float) -> str:
    """Turn down a version awaiting approval: it stays held, recorded as kind :data:`REJECTION`. Returns
    the ledger run id."""
    _check_awaiting(ws, version_id, "reject")
    today = datetime.now(ZoneInfo(timezone)).date().isoformat()
    with workspace_lock(ws.lock, f"{REJECTION} of {version_id}", stale_seconds):
        _check_awaiting(ws, version_id, "reject")
        run_id = ledger.start_run(ws, REJECTION, today)
        ledger.finish_run(ws, run_id, "done", version_id=version_id, state="held",
                          message=f"rejected by {by}: {reason}")
    return run_id
