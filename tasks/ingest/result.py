"""The day's result: checked files joined in listing order, exact duplicates flagged across the whole
partition, valid rows (the store's contract) split from rejected ones (the quarantine's contract, raw
values as text, every reason of a row).
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from tasks import schemas
from tasks.config import Config
from tasks.ingest.columns import CANONICAL
from tasks.ingest.partition import PartitionListing, list_partition
from tasks.ingest.read import CheckedFile, read_log_file
from tasks.ingest.rows import ORDER, duplicate_mask, reason_phrases, reason_strings


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

    @property
    def no_valid_rows(self) -> bool:
        """Nothing to store for this day: missing partition, files without rows, or every row rejected.
        A night should say so (an empty day), not look like a normal one."""
        return self.rows_valid == 0

    def summary(self) -> str:
        """One line for logs, the ledger and alerts; an empty day starts ``run date D: 0 valid rows:``."""
        head = f"run date {self.run_date}: "
        if self.missing:
            return head + "0 valid rows: partition missing (input.missing_partition = \"skip\")"
        if self.rows_valid == 0:
            why = ("0 rows in them" if self.rows_read == 0
                   else f"{self.rows_read} row(s), all quarantined")
            return head + f"0 valid rows: {len(self.files)} file(s) read, {why}"
        return head + f"{self.rows_valid} valid rows, {self.rows_rejected} quarantined, from {len(self.files)} file(s)"


# STORE with input_file dictionary-encoded: one path per file instead of one string per row in memory
# (a pandas categorical in ``IngestResult.valid``); the store writes it as plain text.
_VALID_SCHEMA = schemas.STORE.set(schemas.STORE.get_field_index("input_file"),
                                  pa.field("input_file", pa.dictionary(pa.int32(), pa.string()), nullable=False))


# Converting an empty Arrow table to pandas costs ~1 ms (dtype reconstruction), paid on every clean file;
# the empty frame is built once and copied.
_EMPTY_REJECTED = schemas.QUARANTINE.empty_table().to_pandas()


def empty_rejected() -> pd.DataFrame:
    """A rejected frame with no rows and the quarantine's columns and dtypes (a fresh copy)."""
    return _EMPTY_REJECTED.copy()


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
    masks["duplicate"] = duplicate_mask(canon, ~bad)
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

    phrases = reason_phrases(cfg)
    bad_rows = np.flatnonzero(bad)
    counts = Counter({phrases[k]: int(masks[k][bad_rows].sum()) for k in ORDER})
    return IngestResult(run_date, valid_t, rejected, files, rows_read, ignored=listing.ignored,
                        reason_counts={r: n for r, n in counts.most_common() if n})


def read_partition(logs: str, run_date: str, cfg: Config) -> IngestResult:
    """Read and validate ``<logs>/dt=<run_date>/*.parquet`` in this process, file after file.

    Raises IngestError for a missing partition (unless ``input.missing_partition = "skip"``), an
    unreadable or 0-byte file, a missing column or a column whose type cannot hold the field. The
    nightly flow runs the same three steps as tasks (files in parallel on the configured task runner):
    :func:`~tasks.ingest.partition.list_partition`, :func:`~tasks.ingest.read.read_log_file` per file,
    :func:`combine_files`.
    """
    listing = list_partition(logs, run_date, cfg)
    return combine_files(listing, [read_log_file(logs, p, run_date, cfg) for p in listing.paths], cfg)


def _build_rejected(run_date: str, parts: list[CheckedFile], paths: list[str], masks: dict[str, np.ndarray],
                    rows: np.ndarray, file_no: np.ndarray, row_no: np.ndarray, cfg: Config) -> pd.DataFrame:
    if rows.size == 0:
        return empty_rejected()
    reasons = reason_strings(masks, rows, reason_phrases(cfg))
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


def _render_text(col: pa.ChunkedArray) -> pa.Array:
    """Raw values as text for the quarantine (types may be what made the row bad)."""
    col = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    if pa.types.is_dictionary(col.type):
        col = col.dictionary_decode()
    try:
        return col.cast(pa.string())
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return pa.array([None if v is None else repr(v) for v in col.to_pylist()], pa.string())
