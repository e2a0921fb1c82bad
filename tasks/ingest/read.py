"""One log file: its bytes read once (size and sha256 from the same buffer), decoded as Parquet, the
configured columns checked for presence, coerced to canonical types and row-checked.

Files of a partition are independent, so :func:`read_log_file` may run for several files at once (the
nightly flow maps it over the configured task runner); only the duplicate check needs the whole
partition and waits for :func:`tasks.ingest.result.combine_files`.
"""

from __future__ import annotations

import hashlib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from tasks.config import Config
from tasks.dates import parse_date
from tasks.ingest.columns import CANONICAL, canonical_columns
from tasks.ingest.errors import IngestError
from tasks.ingest.rows import check_rows
from tasks.workspace import resolve


@dataclass
class CheckedFile:
    """One log file read and row-checked: every check except duplicates, which need the whole partition.

    meta: ``{"path", "size" (bytes), "sha256"}``; raw: the configured columns as read (canonical names);
    canon: canonical types with ratings snapped onto the scale's step; masks: boolean ``[rows]`` arrays by
    reason key (:data:`tasks.ingest.rows.ORDER` without ``duplicate``). Picklable, so a distributed task
    runner can return it.
    """

    path: str
    meta: dict
    raw: pa.Table
    canon: pa.Table
    masks: dict[str, np.ndarray]


def read_log_file(logs: str, path: str, run_date: str, cfg: Config) -> CheckedFile:
    """Read one file of the partition (``path`` as listed by :func:`tasks.ingest.partition.list_partition`)
    and run every row check that needs no other file. Files are independent, so they can be read in parallel."""
    day = parse_date(run_date)
    fs, _ = resolve(logs)
    rows, meta = _read_file(fs, path, cfg)
    masks, snapped = check_rows(rows.canon, rows.flags, day, cfg)
    canon = rows.canon.set_column(rows.canon.schema.get_field_index("rating"), "rating",
                                  pa.array(snapped, pa.float64()))
    return CheckedFile(path, meta, rows.raw, canon, masks)


@dataclass
class _FileRows:
    path: str
    raw: pa.Table                   # the configured columns as read, renamed to canonical names
    canon: pa.Table                 # canonical types (rating float64, event_time us UTC, ...)
    flags: dict[str, np.ndarray]    # conversion failures by reason key


def _read_bytes(fs: pafs.FileSystem, path: str) -> pa.Buffer:
    try:
        with fs.open_input_stream(path) as fh:
            return fh.read_buffer()
    except (OSError, pa.ArrowException) as exc:
        raise IngestError(f"{path}: cannot be opened ({exc})") from exc


def _sha256(buf: pa.Buffer) -> str:
    return hashlib.sha256(memoryview(buf)).hexdigest()


def _read_file(fs: pafs.FileSystem, path: str, cfg: Config) -> tuple[_FileRows, dict]:
    buf = _read_bytes(fs, path)
    if buf.size == 0:
        raise IngestError(f"{path}: file is empty (0 bytes), not a Parquet file")
    # hashlib releases the GIL on large buffers, so the checksum runs beside the Parquet decode (on one
    # long-lived thread: starting a thread per file cost ~4 ms a file).
    digest = _hasher().submit(_sha256, buf)
    rows = _parse_file(buf, path, cfg)
    return rows, {"path": path, "size": buf.size, "sha256": digest.result()}


_HASHER: list[ThreadPoolExecutor] = []


def _hasher() -> ThreadPoolExecutor:
    if not _HASHER:
        _HASHER.append(ThreadPoolExecutor(max_workers=2, thread_name_prefix="tarewise-sha256"))
    return _HASHER[0]


def _parse_file(buf: pa.Buffer, path: str, cfg: Config) -> _FileRows:
    cols = cfg.input.columns
    names = {c: getattr(cols, c) for c in CANONICAL}
    try:
        pf = pq.ParquetFile(pa.BufferReader(buf), page_checksum_verification=True)
        schema = pf.schema_arrow
    except (OSError, pa.ArrowException, ValueError) as exc:
        raise IngestError(f"{path}: not a readable Parquet file, corrupt or truncated ({exc})") from exc
    present = schema.names
    for canon, name in names.items():
        count = present.count(name)
        if count == 0:
            raise IngestError(f"{path}: missing required column '{name}' (input.columns.{canon}); "
                              f"columns present: {', '.join(present) or '(none)'}")
        if count > 1:
            raise IngestError(f"{path}: column '{name}' (input.columns.{canon}) appears {count} times")
    wanted = list(dict.fromkeys(names.values()))
    try:
        table = pf.read(columns=wanted, use_threads=True)
    except (OSError, pa.ArrowException, ValueError) as exc:
        raise IngestError(f"{path}: not a readable Parquet file, corrupt or truncated ({exc})") from exc
    raw = pa.table({c: table.column(names[c]) for c in CANONICAL})
    canon, flags = canonical_columns(raw, path, names)
    return _FileRows(path, raw, canon, flags)
