"""The way back from the shared copy (``tasks/operate/shared_copy.py``): a new workspace starts from it,
and a reader elsewhere takes the live predictions from it alone."""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import dataclass

import pyarrow as pa
import pyarrow.parquet as pq

from tasks.files import atomic_write_bytes
from tasks.operate.shared_copy import (POINTER, Journal, SharedCopy, SharedCopyError, _belongs, _is_manifest, _rank,
                                       _sha256, _version_of)
from tasks.publish import versions
from tasks.workspace import Workspace


@dataclass(frozen=True)
class RestoreResult:
    uri: str
    files: int
    versions: list[str]
    live: str | None

    def summary(self) -> str:
        if not self.files:
            return f"shared copy {self.uri}: nothing to restore"
        return (f"restored {self.files} file(s) from {self.uri}: {len(self.versions)} version(s), "
                f"live {self.live or 'none'}")


def restore(ws: Workspace, shared: SharedCopy) -> RestoreResult:
    """Copy into the workspace every file of the shared copy that the workspace lacks. Call it holding
    the workspace lock.

    Nothing local is overwritten. A version is restored only when its manifest is on the shared copy
    (a whole version), into a staging folder renamed into place as when it was published; the live
    pointer only when the workspace has none and the version it names is now here. Restored files are
    journalled as copied, so the next :func:`push` does not send them back.
    """
    remote = shared.listing()
    journal = Journal.read(ws, shared.uri)
    whole = {_version_of(r) for r in remote if _is_manifest(r)}
    wanted = [r for r in remote if _belongs(r) and r != POINTER and not (ws.root / r).exists()]
    by_version: dict[str, list[str]] = {}
    plain = []
    for rel in wanted:
        vid = _version_of(rel)
        if vid is None:
            plain.append(rel)
        elif vid in whole and not (ws.versions / vid).exists():
            by_version.setdefault(vid, []).append(rel)
    copied: list[str] = []
    for rel in sorted(plain, key=_rank):
        shared.get(rel, ws.root / rel)
        copied.append(rel)
    for vid, rels in sorted(by_version.items()):
        staging = ws.versions / f".staging-{vid}"
        shutil.rmtree(staging, ignore_errors=True)
        for rel in rels:
            shared.get(rel, staging / rel.split("/", 2)[2])
        os.rename(staging, ws.versions / vid)
        copied.extend(rels)
    live = None
    if POINTER in remote and not ws.live_pointer.exists():
        pointer = shared.read_bytes(POINTER)     # one read: the bytes checked are the bytes written
        vid = json.loads(pointer).get("version_id")
        if vid and (ws.versions / vid / "manifest.json").exists():
            atomic_write_bytes(ws.live_pointer, pointer)
            copied.append(POINTER)
            journal.pointer = _sha256(pointer)
            live = vid
    for rel in copied:
        st = (ws.root / rel).stat()
        journal.files[rel] = [st.st_size, st.st_mtime_ns]
    if copied:
        journal.write(ws)
    return RestoreResult(shared.uri, len(copied), sorted(by_version), live or versions.live_version(ws))


def is_new(ws: Workspace) -> bool:
    """A workspace that has never run a night (no ledger, or only ``refused`` rows of runs that gave up
    waiting for the lock): the case where a night restores first."""
    if not ws.ledger.exists():
        return True
    from tasks.ledger import read_ledger
    return bool((read_ledger(ws)["status"] == "refused").all())


def read_live_predictions(uri: str) -> tuple[str, pa.Table]:
    """For a consumer elsewhere: the live version id and its predictions, read from the shared copy
    alone (``live.json``, then that version's ``predictions.parquet``; columns ``schemas.PREDICTIONS``)."""
    shared = SharedCopy.at(uri)
    try:
        pointer = json.loads(shared.read_bytes(POINTER))
    except FileNotFoundError:
        raise SharedCopyError(f"{uri}: no {POINTER} yet (no night has been copied here)") from None
    vid = pointer.get("version_id")
    if not vid:
        raise SharedCopyError(f"{uri}: {POINTER} names no live version")
    rel = f"versions/{vid}/predictions.parquet"
    try:
        return vid, pq.read_table(shared.path(rel), filesystem=shared.fs)
    except (OSError, pa.ArrowException) as exc:
        raise SharedCopyError(f"paths.shared = {uri!r}: could not read {rel}: {exc}") from exc
