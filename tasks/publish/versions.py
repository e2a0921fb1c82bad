"""Versions: publish a candidate crash-safely, switch the live pointer atomically, list, roll back, prune.

A version is ``versions/<version_id>/`` holding ``predictions.parquet``, ``model/`` (candidate checkpoint),
``shadow/`` (the plain shadow checkpoint, when trained) and ``manifest.json``. It is written under
``versions/.staging-<id>`` and renamed into place in one step, so a reader sees a whole version or none.
``live.json`` names the live version and keeps the switch history; it is replaced atomically.

A version's state is derived, never edited in place: ``live`` (the pointer names it), ``held`` (the
promotion gate refused it; the manifest keeps the reason), ``retired`` (was live once, no longer), or
``candidate`` (promoted by the gate but never switched live, e.g. a crash between rename and switch, or
a backfill that publishes only its last night as live).
"""

from __future__ import annotations

import json
import os
import shutil
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from tasks import failpoints
from tasks.engine.checkpoint import Checkpoint
from tasks.schemas import PREDICTIONS
from tasks.files import atomic_write_json, fsync_dir
from tasks.workspace import Workspace


class VersionError(ValueError):
    pass


def _utcnow() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def new_version_id(ws: Workspace, run_date: str) -> str:
    """``v<YYYYMMDD>-<n>``: n counts the versions already published for that run date."""
    stem = "v" + run_date.replace("-", "")
    existing = [p.name for p in ws.versions.glob(f"{stem}-*")] if ws.versions.exists() else []
    nums = [int(n.rsplit("-", 1)[1]) for n in existing if n.rsplit("-", 1)[1].isdigit()]
    return f"{stem}-{max(nums, default=0) + 1}"


def clean_staging(ws: Workspace) -> list[str]:
    """Remove half-written versions left by a crashed run; return their names."""
    if not ws.versions.exists():
        return []
    gone = []
    for p in ws.versions.glob(".staging-*"):
        shutil.rmtree(p, ignore_errors=True)
        gone.append(p.name)
    return gone


def publish(ws: Workspace, version_id: str, candidate: Checkpoint, predictions: pd.DataFrame,
            manifest: dict, shadow: Checkpoint | None = None) -> Path:
    """Write the version under a staging name and rename it into place. Does not switch live."""
    ws.versions.mkdir(parents=True, exist_ok=True)
    final = ws.versions / version_id
    if final.exists():
        raise VersionError(f"version {version_id} already exists at {final}")
    staging = ws.versions / f".staging-{version_id}"
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir()
    pq.write_table(pa.Table.from_pandas(predictions, schema=PREDICTIONS, preserve_index=False),
                   staging / "predictions.parquet")
    candidate.save(staging / "model")
    if shadow is not None:
        shadow.save(staging / "shadow")
    manifest = dict(manifest, version_id=version_id, published_at=_utcnow())
    (staging / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True, default=str) + "\n")
    fsync_dir(staging)
    failpoints.hit("publish:staged")
    os.rename(staging, final)
    fsync_dir(ws.versions)
    failpoints.hit("publish:renamed")
    return final


def read_pointer(ws: Workspace) -> dict:
    if not ws.live_pointer.exists():
        return {"version_id": None, "history": []}
    return json.loads(ws.live_pointer.read_text())


def live_version(ws: Workspace) -> str | None:
    return read_pointer(ws).get("version_id")


def set_live(ws: Workspace, version_id: str, reason: str) -> None:
    """Atomically make ``version_id`` live (it must exist)."""
    if not (ws.versions / version_id / "manifest.json").exists():
        raise VersionError(f"no version {version_id} under {ws.versions}")
    pointer = read_pointer(ws)
    history = pointer.get("history", []) + [{"version_id": version_id, "at": _utcnow(), "reason": reason}]
    failpoints.hit("live:before-switch")
    atomic_write_json(ws.live_pointer, {"version_id": version_id, "history": history})


def read_manifest(ws: Workspace, version_id: str) -> dict:
    path = ws.versions / version_id / "manifest.json"
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        raise VersionError(f"no version {version_id} (missing {path})") from None


def load_checkpoint(ws: Workspace, version_id: str, which: str = "model") -> Checkpoint | None:
    path = ws.versions / version_id / which
    return Checkpoint.load(path) if path.exists() else None


def list_versions(ws: Workspace) -> list[dict]:
    """Manifests of every published version, oldest first, each with its derived ``state``."""
    if not ws.versions.exists():
        return []
    pointer = read_pointer(ws)
    live = pointer.get("version_id")
    ever_live = {h["version_id"] for h in pointer.get("history", [])}
    out = []
    for p in ws.versions.iterdir():
        if p.name.startswith(".") or not (p / "manifest.json").exists():
            continue
        m = json.loads((p / "manifest.json").read_text())
        promoted = m.get("gate", {}).get("promote", False)
        m["state"] = ("live" if p.name == live else "retired" if p.name in ever_live
                      else "candidate" if promoted else "held")
        out.append(m)
    return sorted(out, key=lambda m: (m.get("run_date", ""), m.get("published_at", ""), m["version_id"]))


def base_for_date(ws: Workspace, run_date: str, head: str | None = None) -> str | None:
    """The version a run for ``run_date`` warm-starts from and is gated against.

    The live version if it is from an earlier date; otherwise walk back along each version's own base
    until one from an earlier date. So re-running a date starts from exactly what its first run started
    from (identical predictions), and a rollback is respected.

    ``head`` starts the walk from that version instead of the live one: a backfill that publishes only
    its last night as live passes the previous backfilled night's version, so the chain carries forward
    through versions that were never live.
    """
    vid = head if head is not None else live_version(ws)
    seen = set()
    while vid is not None and vid not in seen:
        seen.add(vid)
        try:
            m = read_manifest(ws, vid)
        except VersionError:
            raise VersionError(f"cannot choose the base for {run_date}: version {vid} is gone from "
                               f"{ws.versions} (deleted by retention?); pin it in retention.pinned, or "
                               "re-run from an earlier date") from None
        if m.get("run_date", "") < run_date:
            return vid
        vid = m.get("base_version")
    return None


def _newest_first(manifests: list[dict]) -> list[dict]:
    return sorted(manifests, key=lambda m: (m.get("published_at", ""), m["version_id"]), reverse=True)


def prune(ws: Workspace, keep: int, pinned: tuple[str, ...] = ()) -> list[str]:
    """Delete all but the ``keep`` most recently published versions; never the live one, a pinned one,
    or the live version's base (needed to re-run the live version's date identically). Returns the
    deleted ids, oldest first.

    "Most recently published", not "latest run date": a re-run or backfill of old dates publishes
    versions that are new work, and the next night of a backfill warm-starts from the one just
    published. A version is first renamed to ``.trash-<id>`` (one atomic step, after which no reader
    lists it), then removed; a crash in between leaves only a hidden folder that the next prune clears.
    """
    if keep < 1:
        raise VersionError(f"retention.keep_versions must be >= 1, got {keep}")
    clear_trash(ws)
    manifests = list_versions(ws)
    live = live_version(ws)
    protect = set(pinned) | ({live} if live else set())
    if live:
        base = read_manifest(ws, live).get("base_version")
        if base:
            protect.add(base)
    newest = {m["version_id"] for m in _newest_first(manifests)[:keep]}
    deleted = []
    for m in manifests:
        vid = m["version_id"]
        if vid in protect or vid in newest:
            continue
        trash = ws.versions / f".trash-{vid}"
        os.rename(ws.versions / vid, trash)
        shutil.rmtree(trash, ignore_errors=True)
        deleted.append(vid)
    return deleted


def clear_trash(ws: Workspace) -> list[str]:
    """Remove ``.trash-*`` folders left by a prune that was interrupted; return their names."""
    if not ws.versions.exists():
        return []
    gone = []
    for p in ws.versions.glob(".trash-*"):
        shutil.rmtree(p, ignore_errors=True)
        gone.append(p.name)
    return gone
