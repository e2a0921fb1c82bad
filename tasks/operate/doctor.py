"""The workspace doctor behind ``tarewise status``: what is damaged or left over, each with its fix.

Checks, in the order a night depends on them: the live pointer (``live.json`` readable, naming a version
that exists), the live version's files against its manifest (sizes and sha256) and whether its model and
shadow checkpoints load (the next night warm-starts from them), every version's manifest, the run ledger,
the workspace lock (is its holder alive?) and half-written versions left by interrupted runs.

Each finding is one line saying what is wrong (with the path) and one line saying how to fix it.
``problem``: a run or a reader would fail or go wrong until someone acts. ``note``: left over and harmless;
the next run clears it by itself. Checks that need more than the workspace (a Prefect server's
deployments) are passed in by the caller (``extra``), so this module stays plain and fast.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Iterable, Literal

from tasks import ledger
from tasks.lock import is_stale, read_lock
from tasks.publish import versions
from tasks.workspace import Workspace

PROBLEM, NOTE = "problem", "note"


@dataclass(frozen=True)
class Finding:
    severity: Literal["problem", "note"]
    what: str   # one line, naming the path
    fix: str    # one line: the command or step that fixes it


def diagnose(ws: Workspace, stale_seconds: float,
             extra: Iterable[Callable[[], list[Finding]]] = ()) -> list[Finding]:
    """Every finding about ``ws``, problems first. ``extra``: further checks (each returns findings); a
    check that raises becomes a problem naming the exception instead of stopping the others."""
    found: list[Finding] = []
    for check in (lambda: _live(ws), lambda: _manifests(ws), lambda: _ledger(ws),
                  lambda: _lock_and_leftovers(ws, stale_seconds), *extra):
        try:
            found += check()
        except Exception as exc:  # noqa: BLE001 - the doctor reports, it never crashes
            found.append(Finding(PROBLEM, f"a workspace check failed: {type(exc).__name__}: {exc}",
                                 "a check should never fail: please report this message"))
    return sorted(found, key=lambda f: f.severity != PROBLEM)


def whole_versions(ws: Workspace, exclude: str | None = None) -> list[str]:
    """Published versions, newest first, whose manifest reads and whose recorded files are all present
    with their recorded sizes (the cheap check; sha256 is checked where a version is used)."""
    out = []
    for m in reversed(versions.list_versions(ws)):
        vid = m["version_id"]
        if vid != exclude and m["state"] != "damaged" and not versions.version_problems(ws, vid, check_sha=False):
            out.append(vid)
    return out


def _rollback_fix(ws: Workspace, live: str | None) -> str:
    good = whole_versions(ws, exclude=live)
    if good:
        return f"`tarewise rollback --to {good[0]}` (the newest other whole version) makes it live again"
    return ("no other whole version to roll back to: move the damaged files aside and run "
            "`tarewise run --cold` to start from scratch")


def _live(ws: Workspace) -> list[Finding]:
    try:
        live = versions.live_version(ws)
    except versions.PointerDamaged as exc:
        return [Finding(PROBLEM, f"live pointer {exc.path} is damaged ({exc.detail}): nights (unless --cold), "
                        "`score` and `prune` refuse to run",
                        _rollback_fix(ws, None) + " and writes a new pointer (the damaged file is kept)")]
    if live is None:
        return []
    folder = ws.versions / live
    if not folder.is_dir():
        return [Finding(PROBLEM, f"live pointer {ws.live_pointer} names version {live}, but {folder} is missing",
                        _rollback_fix(ws, live))]
    damage = versions.version_problems(ws, live)
    if not damage:
        damage = [p for p in (versions.load_checkpoint_checked(ws, live, which)[1] for which in ("model", "shadow"))
                  if p]
    return [Finding(PROBLEM, f"live version {live}: {d}; the next night refuses to warm-start from it",
                    _rollback_fix(ws, live) + ", or `tarewise run --cold` starts from scratch") for d in damage]


def _manifests(ws: Workspace) -> list[Finding]:
    return [Finding(PROBLEM, m["damage"], f"delete the folder {ws.versions / m['version_id']} (it can no longer be "
                    "listed, rolled back to or warm-started from)")
            for m in versions.list_versions(ws) if m["state"] == "damaged"]


def _ledger(ws: Workspace) -> list[Finding]:
    try:
        ledger.read_ledger(ws)
    except Exception as exc:  # noqa: BLE001 - any failure to read it is damage
        return [Finding(PROBLEM, f"run ledger {ws.ledger} cannot be read ({type(exc).__name__}: {exc}); every "
                        "run fails when it records itself",
                        f"move it aside (mv {ws.ledger} {ws.ledger}.damaged): the next run starts a new ledger, "
                        "and backfills then re-run dates they no longer know are done")]
    return []


def _lock_and_leftovers(ws: Workspace, stale_seconds: float) -> list[Finding]:
    found = []
    holder = read_lock(ws.lock)
    busy = holder is not None and not is_stale(holder, stale_seconds)
    if ws.lock.exists() and holder is None:
        found.append(Finding(NOTE, f"lock file {ws.lock} is unreadable (a run died while taking it)",
                             "the next run takes it over; or delete it if no run is going"))
    elif holder is not None and not busy:
        found.append(Finding(NOTE, f"lock file {ws.lock} is stale: {holder.get('what', '?')} (pid "
                             f"{holder.get('pid')} on {holder.get('host')}) is gone or older than "
                             "runtime.lock_stale_seconds", "the next run takes it over; or delete it"))
    if busy or not ws.versions.is_dir():
        return found   # a run in progress owns its staging folder
    for left in sorted(p for p in ws.versions.iterdir() if p.name.startswith((".staging-", ".trash-"))):
        staging = left.name.startswith(".staging-")
        found.append(Finding(NOTE, f"{'half-written' if staging else 'half-deleted'} version {left} left by an "
                             "interrupted run", f"the next {'run' if staging else 'run or `tarewise prune`'} "
                             "removes it; or delete the folder"))
    return found
