"""What an id is: one rule for user and item ids, used by ingest and by ``tarewise score`` alike.

Ids are compared exactly, as text. An id column may be text (any Arrow string type, dictionary-encoded or
UTF-8 bytes) or numbers: integers become their decimal text (``23`` -> ``"23"``), and so do floats that
hold a whole number (``23.0`` -> ``"23"``, what a CSV-to-Parquet step makes of an integer column with a
gap); ``23.5`` is no id. An id is refused when it is missing, empty or blanks only (``"   "``,
``"\t\n"``: an upstream bug that blanks ids must not merge those rows into one phantom member or title),
has blanks at its start or end, or is longer than ``input.max_id_length`` characters.

Blanks at either end are refused, not trimmed: trimming would silently merge ``"member-7 "`` into
``"member-7"``, and keeping them would make a second, phantom member; either way the upstream export is
what needs fixing, and the quarantine (reason counts, the rejected share) says so. Blanks are Unicode
white space as Arrow's ``utf8_trim_whitespace`` knows it (space, tab, line breaks, no-break space, ...).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tasks.ingest.errors import IngestError

#: Mask keys of :func:`id_masks`, in the order a row's reasons are listed.
ID_CHECKS = ("null", "type", "long", "padded")


def as_text(arr: pa.ChunkedArray, label: str) -> tuple[pa.ChunkedArray, np.ndarray]:
    """An id column as text (``pa.string()``, nulls where unusable) and its not-a-whole-number mask.

    label: how errors name the column, e.g. ``"<file>: column 'member' (input.columns.user_id)"``.
    Raises :class:`IngestError` for a type that cannot hold ids at all (booleans, timestamps, ...) and
    for bytes that are not UTF-8.
    """
    if pa.types.is_dictionary(arr.type):
        arr = arr.cast(arr.type.value_type)
    t = arr.type
    if pa.types.is_string(t):
        return arr, _none(arr)
    if pa.types.is_large_string(t) or pa.types.is_string_view(t) or pa.types.is_null(t) or pa.types.is_integer(t):
        return arr.cast(pa.string()), _none(arr)
    if pa.types.is_floating(t):
        # 123.0 is the integer 123 stored as float; 1.5 is no id at all.
        x = arr.to_numpy(zero_copy_only=False).astype(np.float64)
        whole = np.isfinite(x) & (np.floor(x) == x) & (np.abs(x) < 2.0**63)
        null = pc.is_null(arr).to_numpy(zero_copy_only=False)
        ints = pa.array(np.where(whole, x, 0).astype(np.int64), mask=~whole)
        return pa.chunked_array([ints.cast(pa.string())]), ~whole & ~null
    if pa.types.is_binary(t) or pa.types.is_large_binary(t):
        try:
            return arr.cast(pa.string()), _none(arr)
        except pa.ArrowInvalid as exc:
            raise IngestError(f"{label} holds bytes that are not UTF-8 text ({exc})") from exc
    raise IngestError(f"{label} has type {t}; expected text or whole numbers")


def _none(arr: pa.ChunkedArray) -> np.ndarray:
    return np.zeros(len(arr), dtype=bool)


def id_masks(ids: pa.ChunkedArray, not_whole: np.ndarray, max_len: int) -> dict[str, np.ndarray]:
    """Boolean ``[rows]`` masks of refused ids, keyed by :data:`ID_CHECKS`: ``null`` (missing, empty or
    blanks only), ``type`` (``not_whole``, from :func:`as_text`), ``long`` (more than ``max_len``
    characters), ``padded`` (blanks at the start or end of a real id). ``ids``: ``pa.string()`` text."""
    nbytes, null, first, last = _edges(ids)
    empty = (null | (nbytes == 0)) & ~not_whole
    # A character takes at least one byte, so only ids longer in bytes need counting in characters.
    long = nbytes > max_len
    if long.any():
        rows = np.flatnonzero(long)
        long[rows] = pc.utf8_length(ids.take(pa.array(rows))).to_numpy(zero_copy_only=False) > max_len
    # Blanks are ASCII control/space bytes or multi-byte characters: only ids whose first or last byte is
    # one of those are trimmed to find out (usually none; every row for ids in a non-Latin script).
    suspect = ~empty & ((first <= 0x20) | (first >= 0x80) | (last <= 0x20) | (last >= 0x80))
    blank = np.zeros(len(nbytes), bool)
    padded = np.zeros(len(nbytes), bool)
    if suspect.any():
        rows = np.flatnonzero(suspect)
        trimmed = pc.utf8_length(pc.utf8_trim_whitespace(ids.take(pa.array(rows)))).to_numpy(zero_copy_only=False)
        chars = pc.utf8_length(ids.take(pa.array(rows))).to_numpy(zero_copy_only=False)
        blank[rows] = trimmed == 0
        padded[rows] = (trimmed > 0) & (trimmed < chars)
    return {"null": empty | blank, "type": not_whole, "long": long & ~blank, "padded": padded}


def _edges(col: pa.ChunkedArray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(UTF-8 byte length, null mask, first byte, last byte) per row of a string column, read straight
    from the offsets and data buffers (no per-row Python). Empty and null rows get byte 0x21 ('!')."""
    parts: list[tuple[np.ndarray, ...]] = []
    for chunk in col.chunks:
        n = len(chunk)
        if n == 0:
            continue
        null = chunk.is_null().to_numpy(zero_copy_only=False) if chunk.null_count else np.zeros(n, bool)
        offsets_buf, data_buf = chunk.buffers()[1], chunk.buffers()[2]
        if offsets_buf is None:   # e.g. an all-null column cast from the null type
            zeros = np.zeros(n, np.int32)
            parts.append((zeros, null, np.full(n, 0x21, np.uint8), np.full(n, 0x21, np.uint8)))
            continue
        offsets = np.frombuffer(offsets_buf, dtype=np.int32)[chunk.offset:chunk.offset + n + 1]
        lengths = np.diff(offsets)
        data = np.frombuffer(data_buf, dtype=np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
        has = lengths > 0
        first = np.full(n, 0x21, np.uint8)
        last = np.full(n, 0x21, np.uint8)
        first[has] = data[offsets[:-1][has]]
        last[has] = data[offsets[1:][has] - 1]
        parts.append((lengths, null, first, last))
    if not parts:
        return np.zeros(0, np.int32), np.zeros(0, bool), np.zeros(0, np.uint8), np.zeros(0, np.uint8)
    return tuple(np.concatenate(k) for k in zip(*parts))  # type: ignore[return-value]
