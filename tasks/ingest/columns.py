"""Typed column coercion: the five configured columns of one file, as read, to their canonical types.

Each input type either converts (ids to text, ratings to float64, event times to int64 microseconds since
the epoch in UTC, source labels to text) or raises :class:`IngestError` naming the file, the column and
the config key (``input.columns.<name>``). A value a convertible type cannot hold (``1.5`` as an id,
``"four"`` as a rating, ``"yesterday"`` as a time) is no error here: it is flagged per row, and the row
checks turn the flag into a quarantine reason.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from tasks.ingest.errors import IngestError
from tasks.ingest.ids import as_text

#: The canonical rating columns, in the order the input config (``input.columns``) names them.
CANONICAL = ("user_id", "item_id", "rating", "event_time", "source")
#: Microseconds per second: event times are int64 microseconds since the epoch.
US = 1_000_000


def canonical_columns(raw: pa.Table, path: str, names: dict[str, str]) -> tuple[pa.Table, dict[str, np.ndarray]]:
    """``raw`` (the :data:`CANONICAL` columns as read) in canonical types, plus conversion failures.

    raw: one file's rows, columns renamed to :data:`CANONICAL`; path: the file (for error messages);
    names: canonical name -> configured column name (for error messages).
    Returns ``(canon, flags)``: canon has columns user_id, item_id (string), rating (float64), source
    (string), event_time_us (int64 microseconds since epoch, UTC; 0 where unusable); flags are boolean
    ``[rows]`` arrays keyed ``user_id_type``, ``item_id_type``, ``rating_text``, ``time_null``, ``time_bad``.
    """
    user, user_bad = as_text(raw["user_id"], _label(path, "user_id", names["user_id"]))
    item, item_bad = as_text(raw["item_id"], _label(path, "item_id", names["item_id"]))
    rating, rating_bad = _as_rating(raw["rating"], path, names["rating"])
    t_us, t_null, t_bad = _as_time(raw["event_time"], path, names["event_time"])
    source = _as_source(raw["source"], path, names["source"])
    canon = pa.table({"user_id": user, "item_id": item, "rating": rating, "source": source})
    flags = {"user_id_type": user_bad, "item_id_type": item_bad, "rating_text": rating_bad,
             "time_null": t_null, "time_bad": t_bad}
    canon = canon.append_column("event_time_us", pa.array(t_us, pa.int64()))
    return canon, flags


# Each converter returns (canonical array with nulls where unusable, bad-cast mask).

def _label(path: str, canon: str, name: str) -> str:
    return f"{path}: column '{name}' (input.columns.{canon})"


def _type_error(path: str, canon: str, name: str, typ: pa.DataType, expected: str) -> IngestError:
    return IngestError(f"{_label(path, canon, name)} has type {typ}; expected {expected}")


def _decode(arr: pa.ChunkedArray) -> pa.ChunkedArray:
    if pa.types.is_dictionary(arr.type):
        return arr.cast(arr.type.value_type)
    return arr


def _no_fail(arr: pa.ChunkedArray) -> np.ndarray:
    return np.zeros(len(arr), dtype=bool)


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
    factor = {"s": US, "ms": 1000}[unit]
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
