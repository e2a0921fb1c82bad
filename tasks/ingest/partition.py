"""Listing a day's partition: which files ``<logs>/dt=YYYY-MM-DD/`` holds, before any is read.

Logs may live on any ``pyarrow.fs`` location (local folder, ``file://``, ``s3://``, ``gs://``). Files and
folders whose name starts with ``_`` or ``.`` are skipped silently (markers, ground-truth folders, temp
files); other files not ending in ``.parquet`` are listed as ignored so a run can warn about them. A
symbolic link whose target is gone is an error naming it: pyarrow's listing leaves such links out, so
the rows of a moved file would otherwise vanish without a word.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field

import pyarrow as pa
import pyarrow.fs as pafs

from tasks.config import Config
from tasks.dates import DateError, parse_date
from tasks.ingest.errors import IngestError
from tasks.workspace import resolve


@dataclass
class PartitionListing:
    """The files of one day's partition, before any is read.

    part: the partition folder inside the filesystem; paths: ``*.parquet`` files, sorted (the order rows
    keep); ignored: other files not read; missing: the partition is absent or empty and
    ``input.missing_partition = "skip"``.
    """

    run_date: str
    part: str
    paths: list[str]
    ignored: list[str] = field(default_factory=list)
    missing: bool = False


def check_logs_folder(logs: str) -> None:
    """Raise IngestError when the logs location itself is absent or is a file: a misspelt path, which is
    a different thing from a day without a partition (``input.missing_partition`` never applies to it)."""
    fs, base = resolve(logs)
    try:
        info = fs.get_file_info(base)
    except (OSError, pa.ArrowException) as exc:
        raise IngestError(f"logs folder {logs}: cannot be listed ({exc})") from exc
    if info.type == pafs.FileType.NotFound:
        raise IngestError(f"logs folder not found: {logs} (paths.logs, --logs or TAREWISE_LOGS); check the path")
    if info.type != pafs.FileType.Directory:
        raise IngestError(f"logs folder {logs} is a file; point paths.logs (--logs, TAREWISE_LOGS) at the folder "
                          "holding the dt=YYYY-MM-DD partitions")


def list_partition(logs: str, run_date: str, cfg: Config) -> PartitionListing:
    """List ``<logs>/dt=<run_date>/``. Raises IngestError for a missing or empty partition (unless
    ``input.missing_partition = "skip"``), for a partition that is a file, and for a logs folder that
    does not exist (whatever ``missing_partition`` says: a missing folder is a wrong path, not a quiet day)."""
    parse_date(run_date)
    fs, part = partition_path(logs, run_date)
    try:
        info = fs.get_file_info(part)
    except (OSError, pa.ArrowException) as exc:
        raise IngestError(f"partition {part}: cannot be listed ({exc})") from exc
    skip = cfg.input.missing_partition == "skip"
    if info.type == pafs.FileType.NotFound:
        check_logs_folder(logs)
        if skip:
            return PartitionListing(run_date, part, [], missing=True)
        raise IngestError(f"partition not found: {part} (no logs for run date {run_date}; the logs folder exists. "
                          "If days without logs are normal here, set input.missing_partition = \"skip\")")
    if info.type != pafs.FileType.Directory:
        raise IngestError(f"partition {part} is a file, expected a folder of Parquet files")
    dangling = _dangling_links(fs, part)
    if dangling:
        raise IngestError(f"partition {part}: dangling symlink {', '.join(dangling)} (the target does not exist); "
                          "restore the target or remove the link")
    paths, ignored = _list_files(fs, part)
    if not paths:
        if skip:
            return PartitionListing(run_date, part, [], ignored, missing=True)
        raise IngestError(f"partition {part} holds no *.parquet files (run date {run_date}"
                          + (f"; not read: {', '.join(ignored)}" if ignored else "") + ")")
    return PartitionListing(run_date, part, paths, ignored)


def partition_path(logs: str, run_date: str) -> tuple[pafs.FileSystem, str]:
    """(filesystem, ``dt=<run_date>`` folder inside it) for the logs location ``logs``."""
    fs, base = resolve(logs)
    return fs, f"{base.rstrip('/')}/dt={run_date}"


def list_partition_dates(logs: str) -> list[str]:
    """Dates of the ``dt=YYYY-MM-DD`` folders under ``logs``, sorted (underscore/dot folders skipped)."""
    check_logs_folder(logs)
    fs, base = resolve(logs)
    dates = []
    for entry in fs.get_file_info(pafs.FileSelector(base, recursive=False)):
        name = entry.base_name
        if entry.type != pafs.FileType.Directory or not name.startswith("dt="):
            continue
        try:
            dates.append(parse_date(name[3:], "partition date").isoformat())
        except DateError:
            continue
    return sorted(dates)


def _hidden(rel: str) -> bool:
    return any(part.startswith(("_", ".")) for part in rel.split("/"))


def _list_files(fs: pafs.FileSystem, part: str) -> tuple[list[str], list[str]]:
    parquet, ignored = [], []
    for entry in fs.get_file_info(pafs.FileSelector(part, recursive=True)):
        if entry.type != pafs.FileType.File:
            continue
        rel = entry.path[len(part):].lstrip("/")
        if _hidden(rel):
            continue
        (parquet if entry.base_name.endswith(".parquet") else ignored).append(entry.path)
    return sorted(parquet), sorted(ignored)


def _dangling_links(fs: pafs.FileSystem, part: str) -> list[str]:
    """``"<link> -> <target>"`` for every non-hidden link under ``part`` whose target does not exist (or
    loops). Object stores have no links: only a local filesystem is walked."""
    if not isinstance(fs, pafs.LocalFileSystem):
        return []
    out = []
    for root, dirs, files in os.walk(part):
        dirs[:] = [d for d in dirs if not d.startswith(("_", "."))]
        for name in files:
            path = os.path.join(root, name)
            if not name.startswith(("_", ".")) and os.path.islink(path) and not os.path.exists(path):
                out.append(f"{path} -> {os.readlink(path)}")
    return sorted(out)


def inputs_key(logs: str, run_date: str, cfg: Config) -> str | None:
    """What a night's result depends on, as one sha256: each input file's name, size and checksum (the
    manifest's ``inputs``) and the config digest (``Config.digest``, paths excluded). Two triggers for
    the same date with the same key would publish the same version. None when the partition cannot be
    listed or read (the night itself then fails with the reason)."""
    try:
        listing = list_partition(logs, run_date, cfg)
        fs, _ = resolve(logs)
        files = []
        for path in listing.paths:
            digest = hashlib.sha256()
            with fs.open_input_stream(path) as fh:
                while chunk := fh.read(1 << 22):
                    digest.update(chunk)
            files.append([path[len(listing.part):].lstrip("/"), digest.hexdigest()])
    except (IngestError, OSError, pa.ArrowException):
        return None
    return key_of(files, cfg)


def key_of(files: list, cfg: Config) -> str:
    """The inputs key of these ``[relative name, sha256]`` pairs under ``cfg``."""
    raw = json.dumps({"files": sorted(files), "config": cfg.digest()}, sort_keys=True)
    return hashlib.sha256(raw.encode()).hexdigest()[:32]
