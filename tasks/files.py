"""Crash-safe file writes: readers see the old file or the new one, never a torn one.

One policy for every file tarewise replaces in its workspace (store and quarantine partitions, the
ledger, metrics, live pointer, reports, journals): write a dot-named temporary file in the target's
folder (readers skip dot files), fsync it, rename it over the target, then fsync the folder so the
rename itself survives a power cut (skipped where the filesystem refuses to open a folder). Version
folders are staged and renamed as a whole by ``tasks/publish/versions.py`` with :func:`fsync_dir`.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Callable

import pyarrow as pa
import pyarrow.parquet as pq


def fsync_dir(path: Path, required: bool = True) -> None:
    """Make the entries of folder ``path`` durable. ``required=False``: ignore filesystems that do not
    allow opening a folder."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        if required:
            raise
        return
    try:
        os.fsync(fd)
    except OSError:
        if required:
            raise
    finally:
        os.close(fd)


def atomic_write(path: Path, write: Callable[[str], None], suffix: str = "") -> None:
    """Call ``write(tmp_path)`` to fill a temporary file beside ``path``, then make it ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=suffix, dir=path.parent)
    os.close(fd)
    try:
        write(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    fsync_dir(path.parent, required=False)


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Replace ``path`` with ``data``."""
    atomic_write(path, lambda tmp: Path(tmp).write_bytes(data))


def atomic_write_json(path: Path, obj: object) -> None:
    """Replace ``path`` with ``obj`` as indented, key-sorted JSON (non-JSON values as strings)."""
    atomic_write_bytes(path, (json.dumps(obj, indent=2, sort_keys=True, default=str) + "\n").encode())


def atomic_write_table(path: Path, table: pa.Table, **options) -> None:
    """Replace ``path`` with ``table`` as zstd-compressed Parquet (``options``: more ``pq.write_table``
    arguments)."""
    atomic_write(path, lambda tmp: pq.write_table(table, tmp, compression="zstd", **options), suffix=".tmp")
