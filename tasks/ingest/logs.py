"""Reading a day's rating logs: the ingest stage's public surface (the work lives in the modules named below).

Input: ``<logs>/dt=YYYY-MM-DD/*.parquet`` (Hive-style partition, any ``pyarrow.fs`` location). A day is
read in three steps, which the nightly flow runs as tasks (files in parallel) and :func:`read_partition`
runs in this process:

1. :func:`list_partition` (``partition.py``): the partition's ``*.parquet`` files; ``_``/``.`` entries
   are skipped, other files listed as ignored.
2. :func:`read_log_file` (``read.py``) per file: bytes, size and sha256; Parquet decode; the configured
   columns coerced to canonical types (``columns.py``; ids by ``ids.py``'s rule, which ``tarewise score``
   shares); every row check but duplicates (``rows.py``).
3. :func:`combine_files` (``result.py``): exact duplicates across the partition; valid rows split from
   rejected ones into an :class:`IngestResult`.

Then :func:`check_rejected_share` stops a night with too many rejected rows and :func:`write_quarantine`
keeps them (``quarantine.py``).

File-level problems (unreadable file, 0 bytes, missing column, a column of a type that cannot hold the
value at all) raise :class:`IngestError` naming the file and column. Row-level problems never raise: the
row goes to ``rejected`` with every reason that applies, joined by ``"; "``. Each reason is a fixed
phrase (values live in the row itself), so counting by reason is meaningful. Everything is vectorised
with pyarrow compute / numpy; no Python loop runs over rows.
"""

from __future__ import annotations

from tasks.ingest.errors import IngestError
from tasks.ingest.partition import PartitionListing, list_partition, list_partition_dates
from tasks.ingest.quarantine import check_rejected_share, rejected_by_reason, rejected_share, write_quarantine
from tasks.ingest.read import CheckedFile, read_log_file
from tasks.ingest.result import IngestResult, combine_files, read_partition
from tasks.ingest.rows import DUPLICATE

__all__ = [
    "DUPLICATE", "CheckedFile", "IngestError", "IngestResult", "PartitionListing", "check_rejected_share",
    "combine_files", "list_partition", "list_partition_dates", "read_log_file", "read_partition",
    "rejected_by_reason", "rejected_share", "write_quarantine",
]
