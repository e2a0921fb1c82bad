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
STORE_DICTIONARY_PAGE = 256 * 2**20    # bytes; a day's distinct ids stay dictionary-encoded (see write_partition)
_BUCKETS = 4_194_301     # a prime; counting buckets (int64, 32 MB) that pre-filter keys that may repeat (<= 1M rows)
_PACK_LIMIT = 2**62      # (user, item, source) codes packed into one int64 key below this many combinations
_DATE_CODES = np.int8     # the window's date codes when it spans fewer than 128 dates
_CHUNK_ROWS = 4_000_000  # rows per hash table when a large window's keys are checked for repeats, group by group


ID_COLUMNS = ("user_id", "item_id", "source")     # read as dictionary-encoded columns (integer codes)


def _sorted_dictionary(col: pa.ChunkedArray) -> pa.DictionaryArray:
    """``col`` (dictionary chunks) as one dictionary array whose dictionary is sorted (byte order of
    UTF-8, i.e. code-point order, as Python sorts text), so code order is text order; int32 codes."""
    col = col.unify_dictionaries()
    if col.num_chunks == 0:
        return pa.DictionaryArray.from_arrays(pa.array([], pa.int32()), pa.array([], pa.string()))
    dictionary = col.chunk(0).dictionary
    order = pc.array_sort_indices(dictionary).to_numpy()
    index = col.type.index_type            # kept: int32 for ids, int8 for the source (see read_window_table)
    rank = np.empty(len(order), index.to_pandas_dtype())
    rank[order] = np.arange(len(order))
    codes = np.concatenate([c.indices.to_numpy(zero_copy_only=False) for c in col.chunks]) if col.num_chunks \
        else np.empty(0, np.int32)
    return pa.DictionaryArray.from_arrays(pa.array(rank[codes], index), dictionary.take(pa.array(order)))


def _merge_shared_dictionaries(col: pa.ChunkedArray) -> pa.ChunkedArray:
    """``col`` (dictionary chunks) with each run of consecutive chunks that carry equal dictionaries as
    one chunk. Parquet's reader hands out a row group in many chunks that all carry the row group's
    dictionary; unifying dictionaries hashes every chunk's dictionary, so a 3-day window of a 100M-rating
    store (78 chunks of about 475k member ids) spent 8.6 s there. Equal dictionaries are found by a
    byte comparison, not by hashing."""
    if col.num_chunks < 2 or not pa.types.is_dictionary(col.type):
        return col
    merged, run = [], [col.chunk(0)]
    for chunk in col.chunks[1:]:
        if chunk.dictionary.equals(run[0].dictionary):
            run.append(chunk)
            continue
        merged.append(run)
        run = [chunk]
    merged.append(run)
    if len(merged) == col.num_chunks:
        return col
    return pa.chunked_array([run[0] if len(run) == 1 else pa.DictionaryArray.from_arrays(
        pa.concat_arrays([c.indices for c in run]), run[0].dictionary) for run in merged], col.type)


def _codes(col: pa.ChunkedArray) -> np.ndarray:
    """Integer codes of a text or dictionary column (equal values, equal codes): the dictionary's indices
    (int32 as the window reads them; no copy)."""
    if isinstance(col, pa.ChunkedArray):
        if pa.types.is_string(col.type) and col.nbytes >= 2**31:
            col = col.cast(pa.large_string())     # one array of >2 GiB text needs 64-bit offsets
        arr = col.combine_chunks()
    else:
        arr = col
    if not pa.types.is_dictionary(arr.type):
        arr = pc.dictionary_encode(arr)     # one array, one dictionary: codes comparable everywhere
    return arr.indices.to_numpy(zero_copy_only=False)


def latest_mask(table: pa.Table) -> np.ndarray:
    """Boolean mask (row order kept) of the rows that win for their (user_id, item_id, source):
    the latest ``event_time``; on equal times the later row. Rows must be in tiebreak order
    (e.g. dates ascending, then input order).

    Ids become integer codes and one int64 key per row; a hash table finds the keys that repeat
    (usually few rows), and only those rows are ordered by time. No string sort.
    """
    n = table.num_rows
    keep = np.ones(n, dtype=bool)
    if n < 2:
        return keep
    user, item = _codes(table["user_id"]), _codes(table["item_id"])
    src = _is_probe(table["source"])
    n_item = int(item.max()) + 1
    if (int(user.max()) + 1) * n_item * 2 < _PACK_LIMIT:
        def key_of(rows):   # (user * n_item + item) * 2 + src, int64, for the rows ``rows`` (slice or indices)
            key = user[rows].astype(np.int64)
            key *= n_item
            key += item[rows]
            key *= 2
            key += src[rows]
            return key
        rows = _repeated_rows(user, key_of)
        key_rows = key_of(rows)
    else:   # too many distinct ids to pack into one int64: rank the triples instead
        user, item, src = user.astype(np.int64), item.astype(np.int64), src.astype(np.int64)
        order = np.lexsort((src, item, user))
        triple = np.stack([user[order], item[order], src[order]], axis=1)
        new = np.append(True, np.any(triple[1:] != triple[:-1], axis=1))
        key = np.empty(n, np.int64)
        key[order] = np.cumsum(new) - 1
        del order, triple, new
        rows = _repeated_rows(user, lambda r: key[r])
        key_rows = key[rows]
    if not len(rows):
        return keep
    times = table["event_time"].cast(pa.int64()).to_numpy(zero_copy_only=False)[rows]
    sub = np.lexsort((rows, times, key_rows))       # by key, then time, then row: the last one wins
    k = key_rows[sub]
    last = np.append(k[1:] != k[:-1], True)
    keep[rows[sub][~last]] = False
    return keep


def _repeated_rows(user: np.ndarray, key_of) -> np.ndarray:
    """Rows (ascending) whose key repeats; ``key_of(rows)`` gives the int64 keys of ``rows`` (a slice or
    indices), and equal keys have equal ``user``.

    Linear, no sort of every key (that was most of the window read). Small windows: rows whose key
    shares a bucket of a counting array with another row are candidates (every repeat is among them,
    plus a few collisions), and a hash table settles which candidates' keys repeat. Large windows: the
    rows are grouped by ``user % parts`` (one comparison pass per group), and each group, about
    ``_CHUNK_ROWS`` rows, gets its own hash table, since a repeat never crosses groups. That holds about
    3 bytes a row plus one group's rows and table, instead of every row's key, index and hash entry at once.
    """
    n = len(user)
    if 4 * n <= _BUCKETS:       # few rows per bucket: the pre-filter leaves few candidates
        key = key_of(slice(None))
        bucket = key % _BUCKETS
        cand = np.flatnonzero(np.bincount(bucket, minlength=_BUCKETS)[bucket] > 1)
        del bucket
        return cand[pd.Series(key[cand], copy=False).duplicated(keep=False).to_numpy()]
    parts = -(-n // _CHUNK_ROWS)
    if parts == 1:
        return np.flatnonzero(pd.Series(key_of(slice(None)), copy=False).duplicated(keep=False).to_numpy())
    # One group's rows at a time (ascending), found by a comparison into a reused mask: 3 bytes a row
    # held (group number and mask) instead of an int64 sort order of every row (8 more).
    group = (user % parts).astype(np.int16 if parts <= 2**15 - 1 else np.int64)
    mask = np.empty(n, bool)
    found = []
    for g in range(parts):
        np.equal(group, g, out=mask)
        rows = np.flatnonzero(mask)
        dup = pd.Series(key_of(rows), copy=False).duplicated(keep=False).to_numpy()
        if dup.any():
            found.append(rows[dup])
    return np.sort(np.concatenate(found)) if found else np.empty(0, np.int64)


def _is_probe(col: pa.ChunkedArray | pa.Array) -> np.ndarray:
    """Boolean ``[N]``: the row's source is a probe rating (text or dictionary column)."""
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
    if pa.types.is_dictionary(col.type):
        hit = pc.equal(col.dictionary, schemas.PROBE).to_numpy(zero_copy_only=False)
        return hit[col.indices.to_numpy(zero_copy_only=False)] if len(hit) else np.zeros(len(col), bool)
    return pc.equal(col, schemas.PROBE).to_numpy(zero_copy_only=False)


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
    # One dictionary page per text column, however many distinct ids a day has: with pyarrow's default
    # (1 MB) a 10M-rating window's days fell back to plain pages part-way, and the window read then
    # hashed every row's id (reading ten such days with read_dictionary: 0.46 s, with this 0.26 s;
    # files about 10% larger). One row group per day: each row group carries its own dictionary, so a day
    # of 4 row groups gave the window read 4 dictionaries of the day's ids to unify, not 1.
    atomic_write_table(path, table, dictionary_pagesize_limit=STORE_DICTIONARY_PAGE,
                       row_group_size=max(1, table.num_rows))
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


def read_window_table(ws: Workspace, run_date: str, days: int, times: bool = True) -> pa.Table:
    """The window as Arrow: ratings of the stored dates in (run_date - days, run_date], latest event per key.

    Columns: user_id, item_id and source as dictionary-encoded text (codes into one sorted dictionary per
    column, so code order is text order: int32 for the ids, int8 for the source), rating (float64),
    event_time, dt (the stored date, dictionary-encoded, int8 codes below 128 dates). Rows in date order,
    then stored order. The ids stay codes all the way: Parquet's own dictionary pages are read as such
    (``read_dictionary``), the days' dictionaries are unified, and the latest event per key is found on
    the integer codes.
    Stores written before this read (plain text columns, no other layout) are read the same way.
    ``times=False`` leaves ``event_time`` out once it has chosen the latest events (the night reads no
    time: 8 bytes a window rating less in every stage).
    """
    tables = []
    dates = window_dates(ws, run_date, days)
    for k, d in enumerate(dates):
        t = pq.read_table(ws.partition(ws.store, d) / PART_FILE, columns=schemas.RATINGS.names,
                          read_dictionary=list(ID_COLUMNS))
        for c in ID_COLUMNS:
            t = t.set_column(t.schema.get_field_index(c), c, _merge_shared_dictionaries(t[c]))
        # Two sources and a few dozen dates: one-byte codes (pandas' categoricals get one-byte codes either
        # way), 6 bytes a row less while the window is read.
        t = t.set_column(t.schema.get_field_index("source"), "source",
                         t["source"].cast(pa.dictionary(pa.int8(), pa.string())))
        tables.append(t.append_column("dt", pa.DictionaryArray.from_arrays(
            pa.array(np.full(t.num_rows, k, _DATE_CODES if len(dates) < 128 else np.int32)),
            pa.array(dates, pa.string()))))
    if not tables:
        empty = window_schema().empty_table()
        return empty if times else empty.drop_columns(["event_time"])
    table = pa.concat_tables(tables)
    del tables
    for c in ID_COLUMNS:
        table = table.set_column(table.schema.get_field_index(c), c, _sorted_dictionary(table[c]))
    keep = latest_mask(table)
    if not times:
        table = table.drop_columns(["event_time"])
    if not keep.all():
        # Column by column, each original dropped once filtered: the window is held about once, not twice.
        mask, names, schema = pa.array(keep), table.column_names, table.schema
        columns = [table.column(c) for c in names]
        del table, keep
        for k in range(len(columns)):
            columns[k] = columns[k].filter(mask)
        table = pa.Table.from_arrays(columns, schema=schema)
    return table


def window_schema() -> pa.Schema:
    """Columns of :func:`read_window_table`: schemas.RATINGS with the text columns dictionary-encoded, + dt."""
    text = pa.dictionary(pa.int32(), pa.string())
    return pa.schema([pa.field(f.name, text if f.name in ID_COLUMNS else f.type, nullable=False)
                      for f in schemas.RATINGS] + [pa.field("dt", text, nullable=False)])


def read_window(ws: Workspace, run_date: str, days: int, categorical: bool = False, times: bool = True
                ) -> pd.DataFrame:
    """Ratings of the stored dates in (run_date - days, run_date], latest event per key across dates
    (:func:`read_window_table` as pandas).

    Columns: schemas.RATINGS (user_id, item_id, rating, event_time, source) + ``dt`` (the stored date,
    text). Rows in date order, then stored order. Empty frame with those dtypes when nothing is stored.
    ``categorical=True`` returns user_id, item_id, source and dt as pandas categoricals whose categories
    are sorted (integer codes plus one copy of each distinct text: what the night uses, far less memory
    on large windows); ``False`` returns them as text. ``times=False``: without ``event_time``.
    """
    table = read_window_table(ws, run_date, days, times)
    if categorical:
        # self_destruct: each Arrow column is released once converted (no second copy of the window).
        frame = table.to_pandas(self_destruct=True, split_blocks=True)
        del table
        # Arrow's allocator keeps the pages the read freed (decoded Parquet pages, the days' separate
        # dictionaries, the pre-filter columns) for its own reuse; training allocates through numpy and
        # torch, which cannot use them. Hand them back (about 10% of the read's peak).
        pa.default_memory_pool().release_unused()
        return frame
    for c in (*ID_COLUMNS, "dt"):
        table = table.set_column(table.schema.get_field_index(c), c, table[c].cast(pa.string()))
    return table.to_pandas()
