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
    characters), ``padded`` (blanks at the start or end of a real id). ``ids``: ``pa.string()`` text.

    Byte lengths before and after Arrow's trim decide blank and padded ids: about 20 ms per million ids
    on 2 busy cores (measured; most of it the trim), no slower than a numpy pre-filter on each id's
    first and last byte that was tried first.
    """
    nbytes = _filled(pc.binary_length(ids))
    kept = _filled(pc.binary_length(pc.utf8_trim_whitespace(ids)))
    null = pc.is_null(ids).to_numpy(zero_copy_only=False) if ids.null_count else np.zeros(len(ids), bool)
    empty = (null | (kept == 0)) & ~not_whole
    # A character takes at least one byte, so only ids longer in bytes need counting in characters.
    long = ~empty & (nbytes > max_len)
    if long.any():
        rows = np.flatnonzero(long)
        long[rows] = pc.utf8_length(ids.take(pa.array(rows))).to_numpy(zero_copy_only=False) > max_len
    return {"null": empty, "type": not_whole, "long": long, "padded": ~empty & (kept < nbytes)}


def _filled(lengths: pa.ChunkedArray) -> np.ndarray:
    """Byte lengths as int64, 0 for nulls."""
    return pc.fill_null(lengths, 0).to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
