"""Where tarewise keeps its state, and how paths are resolved through ``pyarrow.fs``.

Layout under the workspace root (all created on demand)::

    store/dt=YYYY-MM-DD/part-0.parquet   validated ratings, every valid row (latest event wins when read)
    quarantine/dt=YYYY-MM-DD/part-0.parquet   rejected rows with a reason
    versions/<version_id>/               predictions.parquet, model/, manifest.json
    live.json                            pointer to the live version (switched atomically;
                                         a damaged one is kept as live.json.damaged-<time>)
    ledger/runs.parquet                  run ledger
    metrics/nightly.parquet              drift metrics time series
    reports/YYYY-MM-DD.html|.json        nightly report and its JSON twin
    alerts/history.jsonl                 every alert ever raised, with delivery outcome
    lock                                 store lock (one run at a time)
    shared-copy.json                     what was copied to the shared copy (tasks/operate/shared_copy.py)
    probe-plans/YYYY-MM-DD.parquet       probe plans (tarewise probe-plan); nights leave their planned
                                         members' probe ratings out of the held-out set
    sweeps/<start>_<end>/s<k>/           scratch workspaces of a settings sweep (tasks/operate/sweep.py)
"""

from __future__ import annotations

import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pyarrow.fs as pafs


def resolve(uri_or_path: str) -> tuple[pafs.FileSystem, str]:
    """Return ``(filesystem, path)`` for a local path or a URI such as ``s3://bucket/prefix``.

    Local relative paths are made absolute so the result does not depend on a later chdir.
    """
    if "://" in uri_or_path:
        return pafs.FileSystem.from_uri(uri_or_path)
    return pafs.LocalFileSystem(), str(Path(uri_or_path).expanduser().resolve())


def overlaps(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """Is one of two local folders the other, or inside it? (Resolved, so relative paths and links count.)"""
    x, y = Path(a).expanduser().resolve(), Path(b).expanduser().resolve()
    return x == y or x in y.parents or y in x.parents


class WorkspaceError(ValueError):
    """The workspace cannot be used as asked (missing, a file, not writable, disk too full); the message
    names the path and the fix."""


#: How every message tells a user to point at another workspace.
POINT_AT = "--workspace DIR, TAREWISE_WORKSPACE=DIR or paths.workspace in the config"


def _nearest_existing(path: Path) -> Path:
    """``path`` or its closest ancestor that exists (a folder, or a file blocking the way)."""
    while not os.path.lexists(path) and path != path.parent:
        path = path.parent
    return path


def check_writable(path: str | os.PathLike, min_free_mb: float = 0.0) -> Path:
    """The resolved workspace root, after checking that a run can write there: the path (or, for a
    workspace not made yet, the folder it will be made in) is a folder, a file can be created in it,
    and its disk has at least ``min_free_mb`` MB free (0: not checked). Raises :class:`WorkspaceError`.

    Writability is tried (a file is created and removed), not read from the permission bits: root may
    write whatever the bits say, and ACLs or a read-only mount can refuse what they allow."""
    root = Path(path).expanduser().resolve()
    base = _nearest_existing(root)
    if not base.is_dir():
        what = "is a file, not a folder" if base == root else f"cannot be made: {base} is a file"
        raise WorkspaceError(f"workspace {root} {what}; point at a folder with {POINT_AT}")
    try:
        fd, probe = tempfile.mkstemp(prefix=".tarewise-write-check-", dir=base)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        where = "" if base == root else f" (its nearest existing folder {base})"
        raise WorkspaceError(f"workspace {root}{where} is not writable: {exc.strerror}; make it writable or "
                             f"point at another folder with {POINT_AT}") from None
    if min_free_mb > 0:
        free_mb = shutil.disk_usage(base).free / 1e6
        if free_mb < min_free_mb:
            raise WorkspaceError(f"workspace {root}: only {free_mb:.0f} MB free on its disk, less than "
                                 f"runtime.min_free_mb = {min_free_mb}; free some space (`tarewise prune` removes "
                                 f"old versions) or point at another disk with {POINT_AT}")
    return root


@dataclass(frozen=True)
class Workspace:
    """Typed access to the workspace layout. State lives on a local (or mounted POSIX) filesystem:
    atomic rename is what makes publishing crash-safe. Logs may be any ``pyarrow.fs`` URI, and
    ``paths.shared`` keeps a copy of the store and versions on one (``tasks/operate/shared_copy.py``)."""

    root: Path

    @classmethod
    def at(cls, path: str | os.PathLike) -> "Workspace":
        p = str(path)
        if "://" in p and not p.startswith("file://"):
            raise ValueError(f"workspace {p!r}: the workspace must be a local or mounted folder (atomic "
                             "publish relies on rename); logs may be remote, and paths.shared keeps a copy "
                             "of the store and versions on an object store")
        p = p.removeprefix("file://")
        root = Path(p).expanduser().resolve()
        root.mkdir(parents=True, exist_ok=True)
        return cls(root)

    @classmethod
    def existing(cls, path: str | os.PathLike) -> "Workspace":
        """The workspace at ``path`` without creating anything; :class:`WorkspaceError` when there is no
        folder there (for commands that only read)."""
        root = Path(str(path).removeprefix("file://")).expanduser().resolve()
        if not root.is_dir():
            what = "is a file, not a folder" if root.exists() else "does not exist"
            raise WorkspaceError(f"workspace {root} {what}")
        return cls(root)

    @property
    def store(self) -> Path:
        return self.root / "store"

    @property
    def quarantine(self) -> Path:
        return self.root / "quarantine"

    @property
    def versions(self) -> Path:
        return self.root / "versions"

    @property
    def live_pointer(self) -> Path:
        return self.root / "live.json"

    @property
    def ledger(self) -> Path:
        return self.root / "ledger" / "runs.parquet"

    @property
    def metrics(self) -> Path:
        return self.root / "metrics" / "nightly.parquet"

    @property
    def reports(self) -> Path:
        return self.root / "reports"

    @property
    def alerts(self) -> Path:
        return self.root / "alerts" / "history.jsonl"

    @property
    def lock(self) -> Path:
        return self.root / "lock"

    def partition(self, base: Path, run_date: str) -> Path:
        return base / f"dt={run_date}"
