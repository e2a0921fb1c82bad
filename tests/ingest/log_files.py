"""Small rating-log Parquet files for the ingest tests, and the runner of the bad-input corpus.

The corpus is one table per module (``test_columns.py``, ``test_read.py``, ``test_rows.py``,
``test_result.py``, ``test_partition.py``): each :class:`Case` writes real Parquet files into a ``dt=``
partition and reads them through :func:`tasks.ingest.logs.read_partition`, the path a night takes. Every
case that reads also stores and quarantines the day, and checks that each input row ends in one of them.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tasks.config import Config
from tasks.ingest import store
from tasks.ingest.logs import IngestError, IngestResult, read_partition, write_quarantine
from tasks.workspace import Workspace

DAY = "2026-11-01"
COLS = ["user_id", "item_id", "rating", "event_time", "source"]
TYPES = {"user_id": pa.string(), "item_id": pa.string(), "rating": pa.float64(),
         "event_time": pa.timestamp("us", tz="UTC"), "source": pa.string()}


def utc(text: str) -> dt.datetime:
    return dt.datetime.fromisoformat(text).replace(tzinfo=dt.timezone.utc)


T0 = utc(f"{DAY}T10:00:00")


def table(rows: list[tuple], names: list[str] = COLS, **types: pa.DataType) -> pa.Table:
    """Rows of (user_id, item_id, rating, event_time, source); ``types`` overrides a column's Arrow type."""
    ty = {**TYPES, **types}
    return pa.table({n: pa.array([r[k] for r in rows], ty[c]) for k, (n, c) in enumerate(zip(names, COLS))})


def good(n: int = 4, start: int = 0) -> list[tuple]:
    return [(f"member-{k:06d}", f"title-{k:06d}", float(1 + k % 5), T0 + dt.timedelta(seconds=k), "organic")
            for k in range(start, start + n)]


def write(logs: Path, data: pa.Table | bytes, name: str = "part-0.parquet", day: str = DAY) -> Path:
    part = logs / f"dt={day}"
    part.mkdir(parents=True, exist_ok=True)
    path = part / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(data, bytes):
        path.write_bytes(data)
    else:
        pq.write_table(data, path)
    return path


def parquet_bytes(t: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(t, sink)
    return sink.getvalue().to_pybytes()


@dataclass
class Case:
    """One kind of input: the files to write, then either the IngestError expected or the rows expected."""

    files: Callable[[], list[tuple[str, pa.Table | bytes]]]
    error: str | None = None                 # expected IngestError text (file-level problems)
    reason: str | None = None                # expected quarantine reason text (row-level problems)
    rejected: int = 0
    valid: int | None = None
    overrides: dict = field(default_factory=dict)
    check: Callable[[IngestResult], None] | None = None


def run_case(case: Case, logs: Path) -> None:
    """Write ``case``'s files under ``logs`` and check what :func:`read_partition` makes of them."""
    cfg = Config().updated(case.overrides) if case.overrides else Config()
    paths = [write(logs, data, fname) for fname, data in case.files()]
    if case.error is not None:
        with pytest.raises(IngestError) as err:
            read_partition(str(logs), DAY, cfg)
        assert case.error in str(err.value)
        return
    res = read_partition(str(logs), DAY, cfg)
    assert len(res.rejected) == case.rejected, res.rejected[["input_row", "reason"]]
    if case.valid is not None:
        assert len(res.valid) == case.valid
    assert res.rows_read == len(res.valid) + len(res.rejected)
    if case.reason is not None:
        assert res.rejected["reason"].str.contains(case.reason, regex=False).all(), res.rejected["reason"].tolist()
    # Nothing is lost: every rejected row names its file and row, and the raw values are kept.
    for _, row in res.rejected.iterrows():
        assert row["input_file"] in {str(p) for p in paths}
        assert row["run_date"] == DAY and row["reason"]
    if case.check is not None:
        case.check(res)
    assert_every_row_kept(res, paths, Workspace.at(logs.parent / "ws"))


def assert_every_row_kept(res: IngestResult, paths: list[Path], ws: Workspace) -> None:
    """Nothing is lost: store the day and quarantine its rejects as a night does, read both back, and
    match them row for row against the input files (counted from the files' own Parquet footers)."""
    write_quarantine(ws, DAY, res.rejected)
    store.write_partition(ws, DAY, res.valid_table)
    stored = pq.read_table(ws.partition(ws.store, DAY) / "part-0.parquet").to_pandas()
    quarantined = pq.read_table(ws.partition(ws.quarantine, DAY) / "part-0.parquet").to_pandas()
    rows_in = {str(p): pq.ParquetFile(p).metadata.num_rows for p in paths}
    assert len(stored) + len(quarantined) == sum(rows_in.values()), (len(stored), len(quarantined), rows_in)
    kept = list(zip(stored["input_file"].astype(str), stored["input_row"])) + \
        list(zip(quarantined["input_file"], quarantined["input_row"]))
    assert sorted(kept) == sorted((p, k) for p, n in rows_in.items() for k in range(n))


def column_is(res: IngestResult, column: str, expected: list) -> None:
    assert res.valid[column].tolist() == expected, res.valid[column].tolist()
