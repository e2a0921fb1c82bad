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
    sweeps/<start>_<end>/s<k>/           scratch workspaces of a settings sweep (tasks/operate/sweep.py)
"""

from __future__ import annotations

import os
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
