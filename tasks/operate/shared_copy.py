"""A shared copy of the workspace (store, versions, live pointer, histories) on any ``pyarrow.fs``
filesystem: S3, GCS, HDFS, Azure, or a mounted folder. Serving jobs elsewhere read it; a fresh machine
starts from it.

Why a copy and not the workspace itself: the workspace publishes crash-safely through atomic renames
and runs one night at a time on a lock file, and object stores offer neither (a "rename" there is a
copy plus a delete, and there is no exclusive create). So the local workspace stays the working copy,
and after each night the shared copy is brought up to date in an order that keeps it consistent for a
reader at every moment:

1. store and quarantine partitions (one object per date; a re-run date is one whole-object write);
2. each new version's files, its ``manifest.json`` last (a version exists on the shared copy once its
   manifest does, as locally);
3. run ledger, drift metrics, alert history, reports;
4. ``live.json`` last: one object write moves readers to the new version. A single-object write is
   atomic on S3 and GCS (a reader sees the old object or the new one); on a local or mounted folder the
   file is written beside its target and renamed over it;
5. then deletions of what retention removed locally, a version's manifest first; never a file of the
   live version.

A night that dies (or whose copy fails) part-way leaves the shared pointer on the previous version,
whose files are all there; the next copy finishes the job.

What changed is known from a journal in the workspace (:data:`JOURNAL`: size and mtime of each file
as it was copied) plus one listing of the shared copy, so a night copies only its new files. Only files
this workspace's journal says it copied are ever deleted from the shared copy: a fresh, empty workspace
pointed at a full shared copy deletes nothing.

One writer per shared copy (the lock is local to the writing machine); any number of readers.
No Prefect here: the flows call :func:`push` and ``shared_restore.restore`` through ``tasks/steps.py``;
the way back (a new workspace starting from the copy, readers elsewhere) is ``tasks/operate/shared_restore.py``.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa
import pyarrow.fs as pafs

from tasks import failpoints
from tasks.publish import versions
from tasks.files import atomic_write_bytes
from tasks.workspace import Workspace, overlaps

JOURNAL = "shared-copy.json"
POINTER = "live.json"
#: Folders of the workspace that are copied whole (hidden entries, e.g. staging or trash, never are).
FOLDERS = ("store", "quarantine", "versions", "reports")
#: Single files of the workspace that are copied.
FILES = ("ledger/runs.parquet", "metrics/nightly.parquet", "alerts/history.jsonl", POINTER)
_CHUNK = 8 << 20    # bytes per read/write when streaming a file


class SharedCopyError(OSError):
    """The shared copy cannot be reached, read or written; the message names ``paths.shared`` and the file.

    An ``OSError`` on purpose: network and permission failures are transient I/O, retried by the flow.
    """


class SharedCopyRefused(SharedCopyError, ValueError):
    """``paths.shared`` itself is wrong (empty, unknown scheme, overlaps the workspace): retrying cannot help."""


@dataclass(frozen=True)
class SharedCopy:
    """Where the shared copy lives: a ``pyarrow.fs`` filesystem and the root folder inside it."""

    uri: str
    fs: pafs.FileSystem
    root: str

    @classmethod
    def at(cls, uri: str, workspace: Workspace | None = None) -> "SharedCopy":
        """Resolve ``paths.shared``: a URI (``s3://bucket/prefix?region=...``, ``gs://...``, ``file:///...``)
        or a local/mounted folder. Refuses a folder inside the workspace (or holding it): the two would
        copy into each other."""
        if not uri:
            raise SharedCopyRefused("paths.shared is empty: no shared copy configured")
        try:
            if "://" in uri:
                fs, root = pafs.FileSystem.from_uri(uri)
            else:
                fs, root = pafs.LocalFileSystem(), str(Path(uri).expanduser().resolve())
        except (pa.ArrowInvalid, ValueError) as exc:
            raise SharedCopyRefused(f"paths.shared = {uri!r}: {exc}") from None
        except OSError as exc:
            raise SharedCopyError(f"paths.shared = {uri!r}: {exc}") from None
        root = root.rstrip("/")
        if fs.type_name == "local" and workspace is not None and overlaps(root, workspace.root):
            raise SharedCopyRefused(f"paths.shared = {uri!r} overlaps the workspace {workspace.root}; "
                                    "choose a folder outside it")
        return cls(uri, fs, root)

    def path(self, rel: str) -> str:
        return f"{self.root}/{rel}" if self.root else rel

    def listing(self) -> dict[str, int]:
        """Every file under the root: relative path -> size in bytes (one recursive listing)."""
        sel = pafs.FileSelector(self.root, recursive=True, allow_not_found=True)
        try:
            infos = self.fs.get_file_info(sel)
        except (OSError, pa.ArrowException) as exc:
            raise SharedCopyError(f"paths.shared = {self.uri!r}: cannot list it: {exc}") from exc
        cut = len(self.root) + 1 if self.root else 0
        return {i.path[cut:]: i.size for i in infos if i.type == pafs.FileType.File}

    def put(self, local: Path, rel: str) -> None:
        """Copy the local file to ``rel``; readers see the old object or the new one, never a torn one."""
        dest = self.path(rel)
        try:
            if self.fs.type_name == "local":
                # A plain write is visible while it grows: write beside the target, then rename over it.
                parent, name = dest.rsplit("/", 1)
                self.fs.create_dir(parent, recursive=True)
                tmp = f"{parent}/.{name}.{uuid.uuid4().hex}.part"
                try:
                    self._stream(local, tmp)
                    self.fs.move(tmp, dest)
                except BaseException:
                    _quiet_delete(self.fs, tmp)
                    raise
            else:
                # One object write: the object appears whole when the upload completes (S3, GCS, Azure).
                try:
                    self._stream(local, dest)
                except FileNotFoundError:      # filesystems with real folders (HDFS) want the parent first
                    self.fs.create_dir(dest.rsplit("/", 1)[0], recursive=True)
                    self._stream(local, dest)
        except (OSError, pa.ArrowException) as exc:
            raise SharedCopyError(f"paths.shared = {self.uri!r}: could not write {rel}: {exc}") from exc

    def _stream(self, local: Path, dest: str) -> None:
        with open(local, "rb") as src, self.fs.open_output_stream(dest, compression=None) as out:
            shutil.copyfileobj(src, out, _CHUNK)

    def get(self, rel: str, local: Path) -> None:
        """Copy ``rel`` to the local file, written beside it and renamed into place."""
        local.parent.mkdir(parents=True, exist_ok=True)
        tmp = local.with_name(f".{local.name}.{uuid.uuid4().hex}.part")
        try:
            with self.fs.open_input_stream(self.path(rel), compression=None) as src, open(tmp, "wb") as out:
                shutil.copyfileobj(src, out, _CHUNK)
            os.replace(tmp, local)
        except (OSError, pa.ArrowException) as exc:
            tmp.unlink(missing_ok=True)
            raise SharedCopyError(f"paths.shared = {self.uri!r}: could not read {rel}: {exc}") from exc

    def read_bytes(self, rel: str) -> bytes:
        try:
            with self.fs.open_input_stream(self.path(rel), compression=None) as src:
                return src.read()
        except FileNotFoundError:
            raise
        except (OSError, pa.ArrowException) as exc:
            raise SharedCopyError(f"paths.shared = {self.uri!r}: could not read {rel}: {exc}") from exc

    def delete(self, rel: str) -> None:
        """Delete ``rel`` and the folders it leaves empty (real folders, or the empty "folder" marker
        objects pyarrow's S3 filesystem writes when a prefix loses its last object)."""
        try:
            self.fs.delete_file(self.path(rel))
        except FileNotFoundError:
            pass
        except (OSError, pa.ArrowException) as exc:
            raise SharedCopyError(f"paths.shared = {self.uri!r}: could not delete {rel}: {exc}") from exc
        parts = rel.split("/")[:-1]
        while parts:
            folder = self.path("/".join(parts))
            try:
                if self.fs.get_file_info(pafs.FileSelector(folder, allow_not_found=True)):
                    return
                self.fs.delete_dir(folder)
            except (OSError, pa.ArrowException):
                return          # an empty folder left behind is harmless
            parts.pop()


def _quiet_delete(fs: pafs.FileSystem, path: str) -> None:
    try:
        fs.delete_file(path)
    except (OSError, pa.ArrowException):
        pass


def local_files(ws: Workspace) -> dict[str, os.stat_result]:
    """The workspace files that belong in the shared copy: relative path (``/``-separated) -> stat.
    Hidden entries (staging and trash folders, temp files) are skipped."""
    out: dict[str, os.stat_result] = {}
    for folder in FOLDERS:
        base = ws.root / folder
        if not base.is_dir():
            continue
        for dirpath, dirnames, filenames in os.walk(base):
            dirnames[:] = [d for d in dirnames if not d.startswith(".")]
            for name in filenames:
                if name.startswith("."):
                    continue
                p = Path(dirpath) / name
                out[p.relative_to(ws.root).as_posix()] = p.stat()
    for rel in FILES:
        p = ws.root / rel
        if p.is_file():
            out[rel] = p.stat()
    return out


def _rank(rel: str) -> tuple[int, str]:
    """Copy order (see the module docstring): partitions, version files, manifests, histories, pointer."""
    if rel == POINTER:
        return 4, rel
    if rel.startswith(("store/", "quarantine/")):
        return 0, rel
    if rel.startswith("versions/"):
        return (2 if _is_manifest(rel) else 1), rel
    return 3, rel


def _is_manifest(rel: str) -> bool:
    """``versions/<id>/manifest.json``: the file whose presence makes a version exist."""
    return rel.endswith("/manifest.json") and rel.count("/") == 2


def _version_of(rel: str) -> str | None:
    parts = rel.split("/")
    return parts[1] if len(parts) > 2 and parts[0] == "versions" else None


@dataclass
class Journal:
    """What this workspace has copied to the shared copy at ``uri``: relative path -> [size, mtime_ns],
    and the sha256 of the ``live.json`` it last wrote there (or restored from there)."""

    uri: str
    files: dict[str, list[int]] = field(default_factory=dict)
    pointer: str | None = None

    @classmethod
    def read(cls, ws: Workspace, uri: str) -> "Journal":
        p = ws.root / JOURNAL
        try:
            raw = json.loads(p.read_text())
        except FileNotFoundError:
            return cls(uri)
        except (ValueError, OSError) as exc:
            raise SharedCopyError(f"{p}: unreadable journal of the shared copy ({exc}); delete it and run "
                                  "`tarewise share --take-over` to copy everything again") from None
        if raw.get("uri") != uri:       # a journal of another location says nothing about this one
            return cls(uri)
        return cls(uri, {k: list(v) for k, v in raw.get("files", {}).items()}, raw.get("pointer"))

    def write(self, ws: Workspace) -> None:
        # One compact line: the journal has an entry per copied file and is rewritten often.
        atomic_write_bytes(ws.root / JOURNAL, json.dumps({"uri": self.uri, "pointer": self.pointer,
                                                          "files": self.files}, sort_keys=True).encode())


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


@dataclass(frozen=True)
class PushPlan:
    uploads: list[str]       # relative paths, in copy order
    deletes: list[str]       # relative paths, in delete order (after the pointer)
    bytes: int
    clears: list[str] = field(default_factory=list)   # removed before the uploads (see plan_push)

    @property
    def empty(self) -> bool:
        return not self.uploads and not self.deletes and not self.clears


def plan_push(ws: Workspace, shared: SharedCopy) -> PushPlan:
    """What :func:`push` would copy and delete, without changing anything."""
    return _plan(ws, Journal.read(ws, shared.uri), local_files(ws), shared.listing())


def _manifest_first(rels) -> list[str]:
    # A version stops being listed the moment its manifest goes, so that goes first.
    return sorted(rels, key=lambda rel: (not _is_manifest(rel), rel))


def _plan(ws: Workspace, journal: Journal, local: dict[str, os.stat_result], remote: dict[str, int]) -> PushPlan:
    uploads = sorted((rel for rel, st in local.items()
                      if remote.get(rel) != st.st_size or journal.files.get(rel) != [st.st_size, st.st_mtime_ns]),
                     key=_rank)
    live = versions.live_version(ws)
    deletes = _manifest_first(rel for rel in journal.files if rel not in local and rel in remote
                              and not (live and _version_of(rel) == live))
    # Files on the shared copy inside a version this workspace also has, but which the local version
    # lacks: left by another writer's version of the same id (only after a take-over). Removed first,
    # so the version there becomes exactly the local one.
    mine = {_version_of(rel) for rel in local} - {None}
    clears = _manifest_first(rel for rel in remote if _version_of(rel) in mine and rel not in local and _belongs(rel))
    return PushPlan(uploads, deletes, sum(local[r].st_size for r in uploads), clears)


def pending_files(ws: Workspace, uri: str) -> int:
    """Local files new or changed since they were last copied to ``uri`` (from the journal alone: no
    request to the shared copy, so ``tarewise status`` stays quick)."""
    journal = Journal.read(ws, uri)
    return sum(journal.files.get(rel) != [st.st_size, st.st_mtime_ns] for rel, st in local_files(ws).items())


@dataclass(frozen=True)
class PushResult:
    uri: str
    uploaded: int
    bytes: int
    deleted: int
    live: str | None

    def summary(self) -> str:
        if not self.uploaded and not self.deleted:
            return f"shared copy {self.uri}: up to date (live {self.live or 'none'})"
        return (f"shared copy {self.uri}: {self.uploaded} file(s) copied ({self.bytes / 1e6:.1f} MB), "
                f"{self.deleted} removed; live {self.live or 'none'}")


def check_single_writer(ws: Workspace, shared: SharedCopy, remote: dict[str, int], journal: Journal) -> None:
    """Refuse to write over a shared copy whose live pointer this workspace did not write (or restore).

    The workspace lock guards one machine only; this catches a second workspace pointed at the same
    location, which would otherwise interleave two histories. Raises :class:`SharedCopyRefused`.
    """
    if POINTER not in remote:
        return
    pointer = shared.read_bytes(POINTER)
    ours = {journal.pointer}
    if ws.live_pointer.exists():   # a copy that died after writing the pointer, before its journal
        ours.add(_sha256(ws.live_pointer.read_bytes()))
    if _sha256(pointer) not in ours:
        live = json.loads(pointer).get("version_id")
        raise SharedCopyRefused(
            f"paths.shared = {shared.uri!r}: its live pointer (version {live}) was not written by this workspace "
            f"({ws.root}); another workspace writes there, or this one never copied or restored from it. "
            "Point paths.shared elsewhere, or, if this workspace is to be the only writer from now on, run "
            "`tarewise share --take-over`.")


def push(ws: Workspace, shared: SharedCopy, take_over: bool = False) -> PushResult:
    """Bring the shared copy up to date with the workspace (order and guarantees: module docstring).
    Call it holding the workspace lock. Idempotent: a second call copies nothing.

    Refuses (:class:`SharedCopyRefused`) when the shared copy's live pointer was written by another
    workspace, unless ``take_over``."""
    journal = Journal.read(ws, shared.uri)
    remote = shared.listing()
    if not take_over:
        check_single_writer(ws, shared, remote, journal)
    stats = local_files(ws)
    plan = _plan(ws, journal, stats, remote)
    for rel in plan.clears:
        shared.delete(rel)
    for k, rel in enumerate(plan.uploads):
        if rel == POINTER:
            journal.write(ws)      # everything before the pointer is recorded even if we die now
            failpoints.hit("shared:before-pointer")
        st = stats[rel]
        shared.put(ws.root / rel, rel)
        journal.files[rel] = [st.st_size, st.st_mtime_ns]
        if rel == POINTER:
            journal.pointer = _sha256((ws.root / rel).read_bytes())
        elif k % 64 == 63:
            journal.write(ws)
    journal.write(ws)
    for rel in plan.deletes:
        shared.delete(rel)
        journal.files.pop(rel, None)
    # Entries for files gone from both sides (e.g. removed by hand) are dropped.
    for rel in [r for r in journal.files if r not in stats]:
        journal.files.pop(rel)
    journal.write(ws)
    return PushResult(shared.uri, len(plan.uploads), plan.bytes, len(plan.deletes) + len(plan.clears),
                      versions.live_version(ws))


def _belongs(rel: str) -> bool:
    """Is ``rel`` (a path on the shared copy) one of the files a workspace copies there?"""
    if rel in FILES:
        return True
    parts = rel.split("/")
    return parts[0] in FOLDERS and len(parts) > 1 and not any(p.startswith(".") for p in parts)
