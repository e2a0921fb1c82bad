"""The nightly metrics time series: one Parquet file at ``ws.metrics``, one row per run date.

Writing a date that is already stored replaces its row (re-runs and backfills are idempotent); the
file is rewritten atomically, so a reader sees the old or the new series, never a torn one. The
table follows ``schemas.NIGHTLY_METRICS``; a row with a key outside the schema is refused.
"""

from __future__ import annotations

import io
import re
from collections.abc import Mapping
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from tasks.schemas import NIGHTLY_METRICS
from tasks.files import atomic_write_bytes
from tasks.workspace import Workspace

_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


class MetricsStoreError(ValueError):
    """The metrics file or a row for it is unusable; the message names the file or key."""


def _empty() -> pa.Table:
    return NIGHTLY_METRICS.empty_table()


def _read_table(path: Path) -> pa.Table:
    if not path.exists():
        return _empty()
    try:
        table = pq.read_table(path)
    except (pa.ArrowInvalid, OSError) as exc:
        raise MetricsStoreError(f"metrics file {path} is not readable Parquet: {exc}") from None
    missing_required = [n for n in ("run_date",) if n not in table.column_names]
    if missing_required:
        raise MetricsStoreError(f"metrics file {path} lacks column(s) {missing_required}")
    # Columns added to the schema after the file was written are filled with nulls; columns no
    # longer in the schema are dropped (nothing reads them).
    arrays = []
    for fld in NIGHTLY_METRICS:
        if fld.name in table.column_names:
            try:
                arrays.append(table.column(fld.name).cast(fld.type))
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
                raise MetricsStoreError(f"metrics file {path}: column {fld.name!r} cannot be read as "
                                        f"{fld.type}: {exc}") from None
        else:
            arrays.append(pa.nulls(table.num_rows, fld.type))
    return pa.Table.from_arrays(arrays, schema=NIGHTLY_METRICS)


def _row_table(row: Mapping) -> pa.Table:
    unknown = sorted(set(row) - set(NIGHTLY_METRICS.names))
    if unknown:
        raise MetricsStoreError(f"metrics row has key(s) {unknown} not in schemas.NIGHTLY_METRICS")
    run_date = row.get("run_date")
    if not isinstance(run_date, str) or not _DATE.match(run_date):
        raise MetricsStoreError(f"metrics row: run_date must be 'YYYY-MM-DD', got {run_date!r}")
    full = {name: row.get(name) for name in NIGHTLY_METRICS.names}
    for fld in NIGHTLY_METRICS:
        try:
            pa.array([full[fld.name]], type=fld.type)
        except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError) as exc:
            raise MetricsStoreError(f"metrics row for {run_date}: {fld.name}={full[fld.name]!r} is not "
                                    f"{fld.type} ({exc})") from None
    return pa.Table.from_pylist([full], schema=NIGHTLY_METRICS)


def write_night_metrics(ws: Workspace, row: Mapping) -> pd.DataFrame:
    """Store one night's row (``compute_night_metrics`` output), replacing any row of that date.

    Returns the series as stored, the same frame :func:`read_metrics` would read back now. Rows stay
    sorted by ``run_date``.
    """
    new = _row_table(row)
    path = ws.metrics
    old = _read_table(path)
    keep = old.filter(pc.not_equal(old.column("run_date"), row["run_date"])) if old.num_rows else old
    table = pa.concat_tables([keep, new]).sort_by("run_date")
    buf = io.BytesIO()
    pq.write_table(table, buf)
    atomic_write_bytes(path, buf.getvalue())
    return _frame(table)


def as_stored(row: Mapping) -> dict:
    """``row`` as the store would give it back (schema types; every column present), without writing it:
    what the alert rules judge before the night is stored. :class:`MetricsStoreError` as for writing."""
    return _frame(_row_table(row)).iloc[0].to_dict()


def _frame(table: pa.Table) -> pd.DataFrame:
    return table.to_pandas().sort_values("run_date").reset_index(drop=True)


def read_metrics(ws: Workspace, until: str | None = None) -> pd.DataFrame:
    """The stored series as a DataFrame sorted by ``run_date`` (columns of ``NIGHTLY_METRICS``).

    ``until``: keep rows with ``run_date <= until``. Empty frame with all columns when nothing is stored.
    """
    df = _frame(_read_table(ws.metrics))
    if until is not None:
        df = df[df["run_date"] <= until].reset_index(drop=True)
    return df


def row_of(series: pd.DataFrame, run_date: str, path: Path) -> dict:
    """The row of ``run_date`` in a series read from ``path`` (:func:`read_metrics`) as a dict;
    :class:`MetricsStoreError` naming the file if absent."""
    hit = series[series["run_date"] == run_date]
    if hit.empty:
        raise MetricsStoreError(f"no metrics stored for {run_date} in {path}; run the nightly for that "
                                "date first")
    return hit.iloc[0].to_dict()


def prune_metrics(ws: Workspace, before: str) -> int:
    """Drop rows with ``run_date < before`` (retention); returns how many were dropped."""
    path = ws.metrics
    old = _read_table(path)
    if not old.num_rows:
        return 0
    keep = old.filter(pc.greater_equal(old.column("run_date"), before))
    dropped = old.num_rows - keep.num_rows
    if dropped:
        buf = io.BytesIO()
        pq.write_table(keep, buf)
        atomic_write_bytes(path, buf.getvalue())
    return dropped
