"""Curated store of validated ratings: one Parquet file per run date, replaced whole on every write.

Layout: ``<workspace>/store/dt=YYYY-MM-DD/part-0.parquet`` with :data:`tasks.schemas.STORE` columns.

Rules
- Idempotent: writing a date replaces that date's file (atomic rename), so re-running a date or a
  backfill never duplicates rows.
- Every valid row of a date is stored, in input order: each input row ends in the store or in the
  quarantine, so a re-rating that a later one replaces is still on record (with its input file and row).
- Which rating counts is decided when the window is read (:func:`read_window`): per (user_id, item_id,
  source) the latest ``event_time`` wins; on equal times the later date, then the later input row (a
  re-rating later in the log replaces the earlier one).
- ``source`` is part of the key on purpose: an organic rating and a probe rating of the same
  (user, item) are different evidence (one chosen by the user, one drawn at random), so both are
  kept; the engine decides how to split them.
"""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from tasks import schemas
from tasks.dates import parse_date, window_start
from tasks.files import atomic_write_table
from tasks.workspace import Workspace

PART_FILE = "part-0.parquet"
_PACK_LIMIT = 2**62      # (user, item, source) codes packed into one int64 key below this many combinations


def _codes(col: pa.ChunkedArray) -> np.ndarray:
    """Integer codes of a text or dictionary column (equal values, equal codes), int64."""
    if isinstance(col, pa.ChunkedArray):
        if pa.types.is_string(col.type) and col.nbytes >= 2**31:
            col = col.cast(pa.large_string())     # one array of >2 GiB text needs 64-bit offsets
        arr = col.combine_chunks()
    else:
        arr = col
    if not pa.types.is_dictionary(arr.type):
        arr = pc.dictionary_encode(arr)     # one array, one dictionary: codes comparable everywhere
    return arr.indices.to_numpy(zero_copy_only=False).astype(np.int64)


def latest_mask(table: pa.Table) -> np.ndarray:
    """Boolean mask (row order kept) of the rows that win for their (user_id, item_id, source):
    the latest ``event_time``; on equal times the later row. Rows must be in tiebreak order
    (e.g. dates ascending, then input order).

    Ids become integer codes and one int64 key per row; a stable sort of the keys finds the keys
    that repeat (usually few rows), and only those rows are ordered by time. No string sort.
    """
    n = table.num_rows
    keep = np.ones(n, dtype=bool)
    if n < 2:
        return keep
    user, item = _codes(table["user_id"]), _codes(table["item_id"])
    src = pc.equal(table["source"], schemas.PROBE).to_numpy(zero_copy_only=False).astype(np.int64)
    n_item = int(item.max()) + 1
    if (int(user.max()) + 1) * n_item * 2 < _PACK_LIMIT:
        key = (user * n_item + item) * 2 + src
    else:   # too many distinct ids to pack into one int64: rank the triples instead
        order = np.lexsort((src, item, user))
        triple = np.stack([user[order], item[order], src[order]], axis=1)
        new = np.append(True, np.any(triple[1:] != triple[:-1], axis=1))
        key = np.empty(n, np.int64)
        key[order] = np.cumsum(new) - 1
    order = np.argsort(key, kind="stable")
    ks = key[order]
    same = ks[1:] == ks[:-1]
    if not same.any():
        return keep
    in_run = np.zeros(n, dtype=bool)
    in_run[1:] |= same
    in_run[:-1] |= same
    rows = order[in_run]                              # grouped by key, rows ascending within a key
    times = table["event_time"].cast(pa.int64()).to_numpy(zero_copy_only=False)[rows]
    sub = np.lexsort((rows, times, key[rows]))       # by key, then time, then row: the last one wins
    k = key[rows][sub]
    last = np.append(k[1:] != k[:-1], True)
    keep[rows[sub][~last]] = False
    return keep


def _to_store_table(valid: pd.DataFrame | pa.Table) -> pa.Table:
    present = valid.column_names if isinstance(valid, pa.Table) else list(valid.columns)
    missing = [c for c in schemas.STORE.names if c not in present]
    if missing:
        raise ValueError(f"cannot store ratings: missing column(s) {', '.join(missing)}")
    if isinstance(valid, pa.Table):
        table = valid.select(schemas.STORE.names)
    else:
        table = pa.Table.from_pandas(valid[schemas.STORE.names], preserve_index=False)
    for name in schemas.STORE.names:
        if table[name].null_count:
            raise ValueError(f"cannot store ratings: column {name} has {table[name].null_count} null value(s)")
    try:
        table = table.cast(schemas.STORE)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError) as exc:
        raise ValueError(f"cannot store ratings: columns do not match the store schema ({exc})") from exc
    bad = pc.invert(pc.is_in(table["source"], pa.array([schemas.ORGANIC, schemas.PROBE])))
    if pc.any(bad).as_py():
        raise ValueError(f"cannot store ratings: source must be '{schemas.ORGANIC}' or '{schemas.PROBE}'")
    return table


def write_partition(ws: Workspace, run_date: str, valid: pd.DataFrame | pa.Table) -> dict:
    """Replace ``store/dt=<run_date>/part-0.parquet`` with ``valid`` (schemas.STORE columns; an Arrow
    table as ingest makes it, or a pandas frame), every row in input order.

    Writes an empty file when ``valid`` is empty (so a re-run that now finds nothing also clears the
    date). Returns ``{"path", "rows"}``.
    """
    parse_date(run_date)
    table = _to_store_table(valid)
    path = ws.partition(ws.store, run_date) / PART_FILE
    atomic_write_table(path, table)
    return {"path": os.fspath(path), "rows": table.num_rows}


def stored_dates(ws: Workspace) -> list[str]:
    """Dates that have a store partition, ascending."""
    if not ws.store.is_dir():
        return []
    dates = []
    for entry in ws.store.iterdir():
        if not entry.name.startswith("dt=") or not (entry / PART_FILE).is_file():
            continue
        try:
            dates.append(parse_date(entry.name[3:], "stored partition date").isoformat())
        except ValueError:
            continue
    return sorted(dates)


def window_dates(ws: Workspace, run_date: str, days: int) -> list[str]:
    """Stored dates in (run_date - days, run_date]."""
    parse_date(run_date)
    if days < 1:
        raise ValueError(f"window days must be >= 1, got {days}")
    start = window_start(run_date, days)
    return [d for d in stored_dates(ws) if start <= d <= run_date]


def empty_window() -> pd.DataFrame:
    schema = schemas.RATINGS.append(pa.field("dt", pa.string(), nullable=False))
    return schema.empty_table().to_pandas()


def read_window(ws: Workspace, run_date: str, days: int, categorical: bool = False) -> pd.DataFrame:
    """Ratings of the stored dates in (run_date - days, run_date], latest event per key across dates.

    Columns: schemas.RATINGS (user_id, item_id, rating, event_time, source) + ``dt`` (the stored date,
    text). Rows in date order, then stored order. Empty frame with those dtypes when nothing is stored.
    ``categorical=True`` returns user_id, item_id, source and dt as pandas categoricals (less memory
    on large windows).
    """
    tables = []
    dates = window_dates(ws, run_date, days)
    for k, d in enumerate(dates):
        t = pq.read_table(ws.partition(ws.store, d) / PART_FILE, columns=schemas.RATINGS.names)
        tables.append(t.append_column("dt", pa.DictionaryArray.from_arrays(
            pa.array(np.full(t.num_rows, k, np.int32)), pa.array(dates, pa.string()))))
    text_cols = ["user_id", "item_id", "source"]
    if not tables:
        out = empty_window()
        return out.astype({c: "category" for c in (*text_cols, "dt")}) if categorical else out
    table = pa.concat_tables(tables)
    keep = latest_mask(table)
    if not keep.all():
        table = table.filter(pa.array(keep))
    if categorical:
        for c in text_cols:
            table = table.set_column(table.schema.get_field_index(c), c, pc.dictionary_encode(table[c]))
    else:
        table = table.set_column(table.schema.get_field_index("dt"), "dt", table["dt"].cast(pa.string()))
    return table.to_pandas()
