"""The day's result (tasks/ingest/result.py): valid rows in the store's contract with their lineage,
rejected rows in the quarantine's contract with raw values as text, configured labels mapped."""

from __future__ import annotations

from pathlib import Path

import pyarrow as pa
from log_files import DAY, T0, Case, column_is, good, run_case, table, write

from tasks import schemas
from tasks.config import Config
from tasks.ingest.logs import read_partition


def test_configured_column_names_and_labels_end_canonical(logs: Path) -> None:
    run_case(Case(
        lambda: [("p.parquet", table([("m1", "t1", 5.0, T0, "feed"), ("m2", "t2", 2.0, T0, "card"),
                                      ("m3", "t3", 2.0, T0, "organic")],
                                     names=["member", "title", "stars", "ts", "origin"]))],
        overrides={"input.columns": {"user_id": "member", "item_id": "title", "rating": "stars",
                                     "event_time": "ts", "source": "origin"},
                   "input.organic_label": "feed", "input.probe_label": "card"},
        reason="source label not recognised (expected 'feed' or 'card'", rejected=1, valid=2,
        check=lambda res: column_is(res, "source", [schemas.ORGANIC, schemas.PROBE])), logs)


def test_valid_rows_follow_store_contract_and_lineage(logs: Path, cfg: Config) -> None:
    rows = good(5)
    rows[2] = ("m", "t", 3.0000000000001, T0, "probe")   # within the step tolerance: snapped to 3.0
    p = write(logs, table(rows))
    res = read_partition(str(logs), DAY, cfg)
    assert list(res.valid.columns) == schemas.STORE.names
    assert str(res.valid["event_time"].dtype) == "datetime64[us, UTC]"
    assert res.valid["rating"].tolist() == [1.0, 2.0, 3.0, 4.0, 5.0]
    assert res.valid["input_row"].tolist() == [0, 1, 2, 3, 4]
    assert set(res.valid["input_file"].astype(str)) == {str(p)}
    assert res.valid.loc[2, "source"] == schemas.PROBE


def test_quarantine_keeps_raw_values_as_text(logs: Path, cfg: Config) -> None:
    write(logs, table([("m", "t", "lots", "not a date", "promo")], rating=pa.string(), event_time=pa.string()))
    res = read_partition(str(logs), DAY, cfg)
    row = res.rejected.iloc[0]
    assert (row["user_id"], row["item_id"], row["rating"], row["event_time"], row["source"]) == \
        ("m", "t", "lots", "not a date", "promo")
    assert row["reason"] == ("rating is not a number; source label not recognised (expected 'organic' or "
                             "'probe', see input.organic_label and input.probe_label); "
                             "event_time is not a readable timestamp")


def test_rows_spread_over_files_keep_their_own_file_and_row(logs: Path, cfg: Config) -> None:
    a = write(logs, table(good(3)), "a.parquet")
    b = write(logs, table(good(2, start=10) + [("m", "t", 7.0, T0, "organic")]), "b.parquet")
    res = read_partition(str(logs), DAY, cfg)
    assert res.rejected[["input_file", "input_row"]].values.tolist() == [[str(b), 2]]
    assert res.valid[["input_file", "input_row"]].astype(str).values.tolist() == \
        [[str(a), "0"], [str(a), "1"], [str(a), "2"], [str(b), "0"], [str(b), "1"]]


def test_a_day_without_valid_rows_says_so(logs: Path, cfg: Config) -> None:
    """The flow needs one clear fact to skip an empty night: no valid rows, and why."""
    write(logs, table([]))
    empty = read_partition(str(logs), DAY, cfg)
    assert empty.no_valid_rows and empty.summary() == (f"run date {DAY}: 0 valid rows: 1 file(s) read, "
                                                       "0 rows in them")
    write(logs, table([("m", "t", 9.0, T0, "organic")]))
    rejected = read_partition(str(logs), DAY, cfg)
    assert rejected.no_valid_rows and rejected.summary() == (f"run date {DAY}: 0 valid rows: 1 file(s) read, "
                                                             "1 row(s), all quarantined")
    write(logs, table(good(2) + [("m", "t", 9.0, T0, "organic")]))
    some = read_partition(str(logs), DAY, cfg)
    assert not some.no_valid_rows and some.summary() == (f"run date {DAY}: 2 valid rows, 1 quarantined, "
                                                         "from 1 file(s)")
    # A day with no partition in an existing logs folder (a missing folder is an error even then).
    skip = read_partition(str(logs), "2026-10-30", cfg.updated({"input.missing_partition": "skip"}))
    assert skip.no_valid_rows and "0 valid rows: partition missing" in skip.summary()
