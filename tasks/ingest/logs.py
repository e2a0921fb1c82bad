"""Read one day of rating logs, validate every row, split into valid rows and quarantined rows.

Input: ``<logs>/dt=YYYY-MM-DD/*.parquet`` (Hive-style partition, any ``pyarrow.fs`` location). Files
and folders whose name starts with ``_`` or ``.`` are ignored (markers, ground-truth folders, temp files);
files not ending in ``.parquet`` are listed in ``IngestResult.ignored`` so a run can warn about them.

File-level problems (unreadable file, 0 bytes, missing column, a column of a type that cannot hold the
value at all) raise :class:`IngestError` naming the file and column. Row-level problems never raise:
the row goes to ``rejected`` with every reason that applies, joined by ``"; "``. Each reason is a fixed
phrase (values live in the row itself), so counting by reason is meaningful.

Everything is vectorised with pyarrow compute / numpy; no Python loop runs over rows.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from tasks import schemas
from tasks.config import Config
from tasks.dates import DateError, parse_date
from tasks.files import atomic_write_table
from tasks.workspace import Workspace, resolve

CANONICAL = ("user_id", "item_id", "rating", "event_time", "source")
_US = 1_000_000
_US_PER_DAY = 86_400 * _US
_STEP_TOLERANCE = 1e-9
_REASON_SEP = "; "

# Fixed reason phrases (some completed with config values in _reasons()).
DUPLICATE = "exact duplicate of an earlier event (same user, item, rating, event_time, source)"


class IngestError(ValueError):
    """Input cannot be ingested; the message names the partition, file, column or config key."""


@dataclass
class IngestResult:
    """One day's ingest.

    valid: schemas.STORE columns (canonical rating columns + input_file + input_row), input order;
        input_file is a pandas categorical (one entry per file).
    rejected: schemas.QUARANTINE columns; raw values rendered as text, ``reason`` says why.
    files: one dict per file read: ``{"path", "size" (bytes), "sha256"}``, sorted by path.
    rows_read: rows in all files (= len(valid) + len(rejected)).
    missing: True when the partition was absent and ``input.missing_partition = "skip"``.
    ignored: paths in the partition that were not read (not ``*.parquet``).
    reason_counts: rejected rows per single reason, most frequent first (a row with two reasons
        counts under both).
    """

    run_date: str
    valid_table: pa.Table
    rejected: pd.DataFrame
    files: list[dict]
    rows_read: int
    missing: bool = False
    ignored: list[str] = field(default_factory=list)
    reason_counts: dict[str, int] = field(default_factory=dict)
    _valid_df: pd.DataFrame | None = field(default=None, init=False, repr=False, compare=False)

    @property
    def valid(self) -> pd.DataFrame:
        """The valid rows as a pandas frame, converted on first use. The night itself stores
        ``valid_table`` directly (Arrow in, Arrow out): converting a day to pandas and back cost about
        as much as validating it."""
        if self._valid_df is None:
            self._valid_df = self.valid_table.to_pandas()
        return self._valid_df

    @property
    def rows_valid(self) -> int:
        return self.valid_table.num_rows

    @property
    def rows_rejected(self) -> int:
        return len(self.rejected)


# STORE with input_file dictionary-encoded: one path per file instead of one string per row in memory
# (a pandas categorical in ``IngestResult.valid``); the store writes it as plain text.
_VALID_SCHEMA = schemas.STORE.set(schemas.STORE.get_field_index("input_file"),
                                  pa.field("input_file", pa.dictionary(pa.int32(), pa.string()), nullable=False))


# Converting an empty Arrow table to pandas costs ~1 ms (dtype reconstruction), paid on every clean file;
# the empty frame is built once and copied.
_EMPTY_REJECTED = schemas.QUARANTINE.empty_table().to_pandas()


def empty_rejected() -> pd.DataFrame:
    return _EMPTY_REJECTED.copy()


def partition_path(logs: str, run_date: str) -> tuple[pafs.FileSystem, str]:
    fs, base = resolve(logs)
    return fs, f"{base.rstrip('/')}/dt={run_date}"


def list_partition_dates(logs: str) -> list[str]:
    """Dates of the ``dt=YYYY-MM-DD`` folders under ``logs``, sorted (underscore/dot folders skipped)."""
    fs, base = resolve(logs)
    info = fs.get_file_info(base)
    if info.type == pafs.FileType.NotFound:
        raise IngestError(f"logs folder not found: {logs}")
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


# ---------------------------------------------------------------------------------------------
# Column normalisation: each returns (canonical array with nulls where unusable, bad-cast mask)
# ---------------------------------------------------------------------------------------------

def _type_error(path: str, canon: str, name: str, typ: pa.DataType, expected: str) -> IngestError:
    return IngestError(f"{path}: column '{name}' (input.columns.{canon}) has type {typ}; expected {expected}")


def _decode(arr: pa.ChunkedArray) -> pa.ChunkedArray:
    if pa.types.is_dictionary(arr.type):
        return arr.cast(arr.type.value_type)
    return arr


def _no_fail(arr: pa.ChunkedArray) -> np.ndarray:
    return np.zeros(len(arr), dtype=bool)


def _as_id(arr: pa.ChunkedArray, path: str, canon: str, name: str) -> tuple[pa.ChunkedArray, np.ndarray]:
    arr = _decode(arr)
    t = arr.type
    if pa.types.is_string(t):
        return arr, _no_fail(arr)
    if pa.types.is_large_string(t) or pa.types.is_string_view(t) or pa.types.is_null(t):
        return arr.cast(pa.string()), _no_fail(arr)
    if pa.types.is_integer(t):
        return arr.cast(pa.string()), _no_fail(arr)
    if pa.types.is_floating(t):
        # 123.0 is the integer 123 stored as float; 1.5 is no id at all.
        x = arr.to_numpy(zero_copy_only=False).astype(np.float64)
        whole = np.isfinite(x) & (np.floor(x) == x) & (np.abs(x) < 2.0**63)
        null = pc.is_null(arr).to_numpy(zero_copy_only=False)
        ints = pa.array(np.where(whole, x, 0).astype(np.int64), mask=~whole)
        return pa.chunked_array([ints.cast(pa.string())]), ~whole & ~null
    if pa.types.is_binary(t) or pa.types.is_large_binary(t):
        try:
            return arr.cast(pa.string()), _no_fail(arr)
        except pa.ArrowInvalid as exc:
            raise IngestError(f"{path}: column '{name}' (input.columns.{canon}) holds bytes that are "
                              f"not UTF-8 text ({exc})") from exc
    raise _type_error(path, canon, name, t, "text or whole numbers")


_NUMBER_RE = r"^[+-]?([0-9]+(\.[0-9]*)?|\.[0-9]+)([eE][+-]?[0-9]+)?$"


def _as_rating(arr: pa.ChunkedArray, path: str, name: str) -> tuple[pa.ChunkedArray, np.ndarray]:
    arr = _decode(arr)
    t = arr.type
    if pa.types.is_float64(t):
        return arr, _no_fail(arr)
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t) or pa.types.is_null(t):
        return arr.cast(pa.float64()), _no_fail(arr)
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        text = pc.utf8_trim_whitespace(arr.cast(pa.string()))
        ok = pc.fill_null(pc.match_substring_regex(text, _NUMBER_RE), False)
        num = pc.if_else(ok, text, pa.scalar(None, pa.string())).cast(pa.float64())
        failed = pc.and_(pc.invert(ok), pc.is_valid(arr)).to_numpy(zero_copy_only=False)
        return num, failed
    raise _type_error(path, "rating", name, t, "numbers (or numbers written as text)")


def _epoch_us(arr: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray]:
    """Timestamp array -> (int64 microseconds since epoch, invalid mask incl. nulls and overflow)."""
    unit = arr.type.unit
    null = pc.is_null(arr).to_numpy(zero_copy_only=False)
    raw = pc.fill_null(arr.cast(pa.int64()), 0).to_numpy(zero_copy_only=False)
    if unit == "us":
        return raw, null
    if unit == "ns":
        return raw // 1000, null
    factor = {"s": _US, "ms": 1000}[unit]
    limit = np.iinfo(np.int64).max // factor
    over = np.abs(raw) > limit
    return np.where(over, 0, raw) * factor, null | over


def _as_time(arr: pa.ChunkedArray, path: str, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """-> (int64 us since epoch UTC, null mask, not-a-timestamp mask). Naive timestamps are read as UTC."""
    arr = _decode(arr)
    t = arr.type
    if pa.types.is_timestamp(t):
        us, invalid = _epoch_us(arr)
        null = pc.is_null(arr).to_numpy(zero_copy_only=False)
        return us, null, invalid & ~null
    if pa.types.is_date(t):
        return _as_time(arr.cast(pa.timestamp("ms")), path, name)
    if pa.types.is_null(t):
        n = len(arr)
        return np.zeros(n, np.int64), np.ones(n, bool), np.zeros(n, bool)
    if pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t):
        null = pc.is_null(arr).to_numpy(zero_copy_only=False)
        text = pd.Series(pc.utf8_trim_whitespace(arr.cast(pa.string())).to_numpy(zero_copy_only=False),
                         dtype=object)
        parsed = pd.to_datetime(text, utc=True, errors="coerce", format="ISO8601")
        bad = parsed.isna().to_numpy()
        us = parsed.dt.as_unit("us").to_numpy(dtype="datetime64[us]").view(np.int64)
        return np.where(bad, 0, us), null, bad & ~null
    raise _type_error(path, "event_time", name, t,
                      "a timestamp, a date or ISO-8601 text (whole numbers are ambiguous: seconds or ms?)")


def _as_source(arr: pa.ChunkedArray, path: str, name: str) -> pa.ChunkedArray:
    arr = _decode(arr)
    t = arr.type
    if pa.types.is_string(t):
        return arr
    if (pa.types.is_large_string(t) or pa.types.is_string_view(t) or pa.types.is_integer(t)
            or pa.types.is_null(t) or pa.types.is_boolean(t)):
        return arr.cast(pa.string())
    raise _type_error(path, "source", name, t, "text labels")


# ---------------------------------------------------------------------------------------------
# Per-file read
# ---------------------------------------------------------------------------------------------

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

    user, user_bad = _as_id(raw["user_id"], path, "user_id", names["user_id"])
    item, item_bad = _as_id(raw["item_id"], path, "item_id", names["item_id"])
    rating, rating_bad = _as_rating(raw["rating"], path, names["rating"])
    t_us, t_null, t_bad = _as_time(raw["event_time"], path, names["event_time"])
    source = _as_source(raw["source"], path, names["source"])
    canon = pa.table({"user_id": user, "item_id": item, "rating": rating, "source": source})
    flags = {"user_id_type": user_bad, "item_id_type": item_bad, "rating_text": rating_bad,
             "time_null": t_null, "time_bad": t_bad}
    canon = canon.append_column("event_time_us", pa.array(t_us, pa.int64()))
    return _FileRows(path, raw, canon, flags)


# ---------------------------------------------------------------------------------------------
# Row checks
# ---------------------------------------------------------------------------------------------

# Order in which reasons are listed for a row.
_ORDER = ["user_id_null", "user_id_type", "user_id_long", "item_id_null", "item_id_type", "item_id_long",
          "rating_null", "rating_text", "rating_nonfinite", "rating_scale", "rating_step", "source_label",
          "time_null", "time_bad", "time_future", "time_wrong_day", "duplicate"]


def _reasons(cfg: Config) -> dict[str, str]:
    s, i = cfg.scale, cfg.input
    lo, hi = f"{s.min:g}", f"{s.max:g}"
    return {
        "user_id_null": "user_id is missing or empty",
        "user_id_type": "user_id is neither text nor a whole number",
        "user_id_long": f"user_id longer than {i.max_id_length} characters (input.max_id_length)",
        "item_id_null": "item_id is missing or empty",
        "item_id_type": "item_id is neither text nor a whole number",
        "item_id_long": f"item_id longer than {i.max_id_length} characters (input.max_id_length)",
        "rating_null": "rating is missing",
        "rating_text": "rating is not a number",
        "rating_nonfinite": "rating is NaN or infinite",
        "rating_scale": f"rating outside the scale [{lo}, {hi}] (scale.min, scale.max)",
        "rating_step": f"rating not on the scale's step of {s.step:g} (scale.step)",
        "source_label": (f"source label not recognised (expected '{i.organic_label}' or '{i.probe_label}', "
                         "see input.organic_label and input.probe_label)"),
        "time_null": "event_time is missing",
        "time_bad": "event_time is not a readable timestamp",
        "time_future": (f"event_time more than {i.max_future_seconds} s after the end of the run date "
                        "(input.max_future_seconds)"),
        "time_wrong_day": ("event_time before the partition date by more than input.max_future_seconds "
                           "(wrong-day partition)"),
        "duplicate": DUPLICATE,
    }


def _np(x) -> np.ndarray:
    return x.to_numpy(zero_copy_only=False)


def _byte_lengths(col: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray]:
    """(UTF-8 byte length, null mask) of a string column, read straight from the offsets buffers."""
    lengths, nulls = [], []
    for chunk in col.chunks:
        buf = chunk.buffers()[1]
        if len(chunk) == 0:
            continue
        if buf is None:   # e.g. an all-null column cast from the null type
            lengths.append(np.zeros(len(chunk), np.int32))
        else:
            offsets = np.frombuffer(buf, dtype=np.int32)[chunk.offset:chunk.offset + len(chunk) + 1]
            lengths.append(np.diff(offsets))
        nulls.append(_np(chunk.is_null()) if chunk.null_count else np.zeros(len(chunk), bool))
    if not lengths:
        return np.zeros(0, np.int32), np.zeros(0, bool)
    return np.concatenate(lengths), np.concatenate(nulls)


def _check_rows(t: pa.Table, flags: dict[str, np.ndarray], day: dt.date, cfg: Config
                ) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Masks by reason key over the concatenated canonical table; returns also snapped ratings."""
    masks = dict(flags)
    max_len = cfg.input.max_id_length
    for col in ("user_id", "item_id"):
        ids = t[col]
        nbytes, null = _byte_lengths(ids)
        masks[f"{col}_null"] = (null | (nbytes == 0)) & ~masks[f"{col}_type"]
        # A character takes at least one byte, so only ids longer in bytes need counting in characters.
        long = nbytes > max_len
        if long.any():
            rows = np.flatnonzero(long)
            chars = _np(pc.utf8_length(ids.take(pa.array(rows))))
            long[rows] = chars > max_len
        masks[f"{col}_long"] = long

    masks.update(_rating_masks(t["rating"], masks["rating_text"], cfg))
    snapped = masks.pop("_snapped")

    src = t["source"]
    known = pc.is_in(src, value_set=pa.array([cfg.input.organic_label, cfg.input.probe_label]))
    masks["source_label"] = ~_np(pc.fill_null(known, False))

    t_us = _np(t["event_time_us"])
    usable = ~(masks["time_null"] | masks["time_bad"])
    start = (day - dt.date(1970, 1, 1)).days * _US_PER_DAY
    end = start + _US_PER_DAY
    no = np.zeros(len(t_us), bool)
    if t_us.size and t_us.min() >= start and t_us.max() < end:   # the usual case: one pass each
        masks["time_future"], masks["time_wrong_day"] = no, no
    else:
        future = usable & (t_us > end + cfg.input.max_future_seconds * _US)
        masks["time_future"] = future
        # Events within the allowance either side of the day are kept: late-flushed buffers put
        # a few events just past midnight into the neighbouring partition, and they are real ratings.
        slack = cfg.input.max_future_seconds * _US
        masks["time_wrong_day"] = usable & ~future & (t_us < start - slack)
    return masks, snapped


def _rating_masks(col: pa.ChunkedArray, not_number: np.ndarray, cfg: Config) -> dict[str, np.ndarray]:
    """Rating masks plus ``_snapped``: ratings within the tolerance moved onto their exact level,
    so later code can compare levels exactly. Whole-array checks first; per-row work only if needed."""
    s = cfg.scale
    r = _np(col).astype(np.float64, copy=False)
    n = r.size
    no = np.zeros(n, bool)
    r_null = _np(pc.is_null(col)) if col.null_count else no
    out = {"rating_null": r_null & ~not_number}
    with np.errstate(invalid="ignore"):
        finite = np.isfinite(r)
        all_finite = bool(finite.all())
        out["rating_nonfinite"] = no if all_finite else ~finite & ~r_null
        lo, hi = s.min - _STEP_TOLERANCE, s.max + _STEP_TOLERANCE
        if n and all_finite and r.min() >= lo and r.max() <= hi:
            out["rating_scale"] = off_scale = no
        else:
            out["rating_scale"] = off_scale = finite & ((r < lo) | (r > hi))
        on_scale = finite & ~off_scale
        if s.step <= 0:
            out["rating_step"] = no
            out["_snapped"] = np.where(on_scale, np.clip(r, s.min, s.max), r)
            return out
        level = np.rint((r - s.min) / s.step)
        snapped = s.min + level * s.step
        if n and all_finite and not off_scale.any() and np.array_equal(snapped, r):
            # The usual night: every rating already sits exactly on a level; one comparison pass.
            out["rating_step"], out["_snapped"] = no, r
            return out
        dev = np.abs(r - snapped)
        out["rating_step"] = on_scale & (dev > _STEP_TOLERANCE)
        if not np.any(dev[on_scale] > 0):
            out["_snapped"] = r
        else:
            ok = on_scale & ~out["rating_step"]
            out["_snapped"] = np.where(ok, np.clip(snapped, s.min, s.max), r)
    return out


def _duplicate_mask(t: pa.Table, candidates: np.ndarray) -> np.ndarray:
    """True for rows (among ``candidates``) that repeat an earlier candidate on every canonical column.

    Exact duplicates share event_time and rating, so a sort of a 64-bit mix of those two numbers first
    narrows the search to rows whose mix is not unique (usually few: events carry microseconds);
    only those go through the exact multi-column grouping. Time-ordered input skips the sort.
    """
    dup = np.zeros(len(candidates), bool)
    idx = np.flatnonzero(candidates)
    if idx.size < 2:
        return dup
    times, ratings = _np(t["event_time_us"]), _np(t["rating"])
    if idx.size < len(candidates):
        times, ratings = times[idx], ratings[idx]
    if times.size and np.all(times[1:] >= times[:-1]):
        # Logs are usually written in time order: then equal times are neighbours and no sort is needed.
        same = times[1:] == times[:-1]
        if not same.any():
            return dup
        in_run = np.zeros(times.size, bool)
        in_run[1:] |= same
        in_run[:-1] |= same
        idx = idx[in_run]
    else:
        with np.errstate(over="ignore"):
            mix = times.view(np.uint64) * np.uint64(0x9E3779B97F4A7C15) ^ ratings.view(np.uint64)
        s = np.sort(mix)
        shared = np.unique(s[1:][s[1:] == s[:-1]])
        if shared.size == 0:
            return dup
        pos = np.minimum(np.searchsorted(shared, mix), shared.size - 1)
        idx = idx[shared[pos] == mix]
    sub = t.take(pa.array(idx)).select(["user_id", "item_id", "rating", "event_time_us", "source"])
    sub = sub.append_column("_pos", pa.array(np.arange(idx.size, dtype=np.int64)))
    first = sub.group_by(["user_id", "item_id", "rating", "event_time_us", "source"], use_threads=False) \
               .aggregate([("_pos", "min")])["_pos_min"]
    if len(first) == idx.size:
        return dup
    keep = np.zeros(idx.size, bool)
    keep[_np(first)] = True
    dup[idx[~keep]] = True
    return dup


def _reason_strings(masks: dict[str, np.ndarray], rows: np.ndarray, phrases: dict[str, str]) -> np.ndarray:
    """Reason text per rejected row: every reason that applies, in _ORDER, joined by '; '.

    Rows are grouped by their combination of reasons (a bit code), so strings are built once per
    combination, not once per row.
    """
    code = np.zeros(rows.size, dtype=np.int64)
    for bit, key in enumerate(_ORDER):
        code |= masks[key][rows].astype(np.int64) << bit
    combos, inverse = np.unique(code, return_inverse=True)
    text = np.array([_REASON_SEP.join(phrases[k] for b, k in enumerate(_ORDER) if (c >> b) & 1)
                     for c in combos], dtype=object)
    return text[inverse]


def _render_text(col: pa.ChunkedArray) -> pa.Array:
    """Raw values as text for the quarantine (types may be what made the row bad)."""
    col = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    if pa.types.is_dictionary(col.type):
        col = col.dictionary_decode()
    try:
        return col.cast(pa.string())
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return pa.array([None if v is None else repr(v) for v in col.to_pylist()], pa.string())


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


@dataclass
class CheckedFile:
    """One log file read and row-checked: every check except duplicates, which need the whole partition.

    meta: ``{"path", "size" (bytes), "sha256"}``; raw: the configured columns as read (canonical names);
    canon: canonical types with ratings snapped onto the scale's step; masks: boolean ``[rows]`` arrays by
    reason key (``_ORDER`` without ``duplicate``). Picklable, so a distributed task runner can return it.
    """

    path: str
    meta: dict
    raw: pa.Table
    canon: pa.Table
    masks: dict[str, np.ndarray]


def list_partition(logs: str, run_date: str, cfg: Config) -> PartitionListing:
    """List ``<logs>/dt=<run_date>/``. Raises IngestError for a missing or empty partition (unless
    ``input.missing_partition = "skip"``) and for a partition that is a file."""
    parse_date(run_date)
    fs, part = partition_path(logs, run_date)
    try:
        info = fs.get_file_info(part)
    except (OSError, pa.ArrowException) as exc:
        raise IngestError(f"partition {part}: cannot be listed ({exc})") from exc
    skip = cfg.input.missing_partition == "skip"
    if info.type == pafs.FileType.NotFound:
        if skip:
            return PartitionListing(run_date, part, [], missing=True)
        raise IngestError(f"partition not found: {part} (run date {run_date}; set "
                          "input.missing_partition = \"skip\" to treat a missing day as empty)")
    if info.type != pafs.FileType.Directory:
        raise IngestError(f"partition {part} is a file, expected a folder of Parquet files")
    paths, ignored = _list_files(fs, part)
    if not paths:
        if skip:
            return PartitionListing(run_date, part, [], ignored, missing=True)
        raise IngestError(f"partition {part} holds no *.parquet files (run date {run_date}"
                          + (f"; not read: {', '.join(ignored)}" if ignored else "") + ")")
    return PartitionListing(run_date, part, paths, ignored)


def read_log_file(logs: str, path: str, run_date: str, cfg: Config) -> CheckedFile:
    """Read one file of the partition (``path`` as listed by :func:`list_partition`) and run every
    row check that needs no other file. Files are independent, so they can be read in parallel."""
    day = parse_date(run_date)
    fs, _ = resolve(logs)
    rows, meta = _read_file(fs, path, cfg)
    masks, snapped = _check_rows(rows.canon, rows.flags, day, cfg)
    canon = rows.canon.set_column(rows.canon.schema.get_field_index("rating"), "rating",
                                  pa.array(snapped, pa.float64()))
    return CheckedFile(path, meta, rows.raw, canon, masks)


def combine_files(listing: PartitionListing, checked: list[CheckedFile], cfg: Config) -> IngestResult:
    """Join the checked files of ``listing`` (in its order) into the day's result: flags exact
    duplicates across the whole partition, splits valid rows from quarantined ones."""
    run_date = listing.run_date
    if listing.missing:
        return IngestResult(run_date, _VALID_SCHEMA.empty_table(), empty_rejected(), [], 0, missing=True,
                            ignored=listing.ignored)
    if [c.path for c in checked] != listing.paths:
        raise ValueError(f"partition {listing.part}: checked files do not match the listing")
    paths = listing.paths
    files = [c.meta for c in checked]
    sizes = [c.canon.num_rows for c in checked]
    rows_read = int(sum(sizes))
    if len(checked) == 1:          # the usual partition: one file, nothing to concatenate
        canon, masks = checked[0].canon, dict(checked[0].masks)
        file_no, row_no = np.zeros(rows_read, np.int32), np.arange(rows_read, dtype=np.int64)
    else:
        canon = pa.concat_tables([c.canon for c in checked])
        masks = {k: np.concatenate([c.masks[k] for c in checked]) for k in checked[0].masks}
        file_no = np.repeat(np.arange(len(checked), dtype=np.int32), sizes)
        row_no = np.concatenate([np.arange(n, dtype=np.int64) for n in sizes])

    bad = np.zeros(rows_read, bool)
    for m in masks.values():
        bad |= m
    masks["duplicate"] = _duplicate_mask(canon, ~bad)
    bad |= masks["duplicate"]

    good = np.flatnonzero(~bad)
    path_arr = pa.array(paths, pa.string())
    if good.size == rows_read:      # the usual night: no copies
        valid_t, valid_file, valid_row = canon, file_no, row_no
    else:
        valid_t, valid_file, valid_row = canon.filter(pa.array(~bad)), file_no[good], row_no[good]
    src = valid_t["source"]
    if (cfg.input.organic_label, cfg.input.probe_label) == (schemas.ORGANIC, schemas.PROBE):
        mapped = src
    else:
        mapped = pc.if_else(pc.equal(src, cfg.input.organic_label), schemas.ORGANIC, schemas.PROBE)
    valid_t = pa.table({
        "user_id": valid_t["user_id"],
        "item_id": valid_t["item_id"],
        "rating": valid_t["rating"],
        "event_time": valid_t["event_time_us"].cast(pa.timestamp("us", tz="UTC")),
        "source": mapped,
        "input_file": pa.DictionaryArray.from_arrays(pa.array(valid_file, pa.int32()), path_arr),
        "input_row": pa.array(valid_row, pa.int64()),
    }, schema=_VALID_SCHEMA)

    rejected = _build_rejected(run_date, checked, paths, masks, np.flatnonzero(bad), file_no, row_no, cfg)

    phrases = _reasons(cfg)
    bad_rows = np.flatnonzero(bad)
    counts = Counter({phrases[k]: int(masks[k][bad_rows].sum()) for k in _ORDER})
    return IngestResult(run_date, valid_t, rejected, files, rows_read, ignored=listing.ignored,
                        reason_counts={r: n for r, n in counts.most_common() if n})


def read_partition(logs: str, run_date: str, cfg: Config) -> IngestResult:
    """Read and validate ``<logs>/dt=<run_date>/*.parquet`` in this process, file after file.

    Raises IngestError for a missing partition (unless ``input.missing_partition = "skip"``), an
    unreadable or 0-byte file, a missing column or a column whose type cannot hold the field. The
    nightly flow runs the same three steps as tasks (files in parallel on the configured task runner):
    :func:`list_partition`, :func:`read_log_file` per file, :func:`combine_files`.
    """
    listing = list_partition(logs, run_date, cfg)
    return combine_files(listing, [read_log_file(logs, p, run_date, cfg) for p in listing.paths], cfg)


def _build_rejected(run_date: str, parts: list[CheckedFile], paths: list[str], masks: dict[str, np.ndarray],
                    rows: np.ndarray, file_no: np.ndarray, row_no: np.ndarray, cfg: Config) -> pd.DataFrame:
    if rows.size == 0:
        return empty_rejected()
    reasons = _reason_strings(masks, rows, _reasons(cfg))
    chunks = []
    for f in np.unique(file_no[rows]):
        sel = rows[file_no[rows] == f]
        local = pa.array(row_no[sel])
        raw = parts[f].raw.take(local)
        chunks.append(pa.table({
            "run_date": pa.repeat(pa.scalar(run_date, pa.string()), sel.size),
            "input_file": pa.repeat(pa.scalar(paths[f], pa.string()), sel.size),
            "input_row": pa.array(row_no[sel], pa.int64()),
            "reason": pa.array(reasons[np.searchsorted(rows, sel)], pa.string()),
            **{c: _render_text(raw[c]) for c in CANONICAL},
        }, schema=schemas.QUARANTINE))
    return pa.concat_tables(chunks).to_pandas()


# ---------------------------------------------------------------------------------------------
# Rejected share and quarantine
# ---------------------------------------------------------------------------------------------

def rejected_share(result: IngestResult) -> float:
    """Rejected rows / rows read (0.0 when nothing was read)."""
    return result.rows_rejected / result.rows_read if result.rows_read else 0.0


def rejected_by_reason(rejected: pd.DataFrame) -> dict[str, int]:
    """Count of rejected rows per single reason (a row with two reasons counts under both), e.g. for a
    quarantine file read back. Reasons are split on ``"; "``; fixed phrases never contain it."""
    counts: Counter[str] = Counter()
    for text, n in rejected["reason"].value_counts().items():
        for reason in str(text).split(_REASON_SEP):
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
