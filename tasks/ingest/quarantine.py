"""Rejected share and quarantine: how much of a day was rejected, whether training may go on, and the
quarantine file that keeps the rejected rows with their reasons.

Layout: ``<workspace>/quarantine/dt=YYYY-MM-DD/part-0.parquet`` with :data:`tasks.schemas.QUARANTINE`
columns, replaced whole on every write.
"""

from __future__ import annotations

import os
from collections import Counter

import pandas as pd
import pyarrow as pa

from tasks import schemas
from tasks.config import Config
from tasks.dates import parse_date
from tasks.files import atomic_write_table
from tasks.ingest.errors import IngestError
from tasks.ingest.result import IngestResult
from tasks.ingest.rows import REASON_SEP
from tasks.workspace import Workspace


def rejected_share(result: IngestResult) -> float:
    """Rejected rows / rows read (0.0 when nothing was read)."""
    return result.rows_rejected / result.rows_read if result.rows_read else 0.0


def rejected_by_reason(rejected: pd.DataFrame) -> dict[str, int]:
    """Count of rejected rows per single reason (a row with two reasons counts under both), e.g. for a
    quarantine file read back. Reasons are split on ``"; "``; fixed phrases never contain it."""
    counts: Counter[str] = Counter()
    for text, n in rejected["reason"].value_counts().items():
        for reason in str(text).split(REASON_SEP):
            counts[reason] += int(n)
    return dict(counts.most_common())


def check_rejected_share(result: IngestResult, cfg: Config) -> None:
    """Raise IngestError (with counts by reason) when too many rows were rejected for training to go on."""
    share = rejected_share(result)
    limit = cfg.input.max_rejected_share
    if share <= limit:
        return
    lines = [f"run date {result.run_date}: {result.rows_rejected} of {result.rows_read} rows rejected "
             f"({share:.1%}), above input.max_rejected_share = {limit:.1%}; reasons:"]
    counts = result.reason_counts or rejected_by_reason(result.rejected)
    lines += [f"  {n:>9}  {reason}" for reason, n in counts.items()]
    raise IngestError("\n".join(lines))


def write_quarantine(ws: Workspace, run_date: str, rejected: pd.DataFrame) -> str:
    """Replace ``quarantine/dt=<run_date>/part-0.parquet`` with ``rejected`` (atomic; empty file when none).

    Returns the path written. Writing the same date again replaces it, so re-runs never duplicate rows.
    """
    parse_date(run_date)
    path = ws.partition(ws.quarantine, run_date) / "part-0.parquet"
    table = pa.Table.from_pandas(rejected, schema=schemas.QUARANTINE, preserve_index=False)
    atomic_write_table(path, table)
    return os.fspath(path)
