"""Ingest: real Parquet files in tmp_path, one parametrized case per kind of bad input."""

from __future__ import annotations

import datetime as dt
import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tasks import schemas
from tasks.config import Config
from tasks.dates import DateError
from tasks.ingest.logs import (DUPLICATE, IngestError, check_rejected_share, list_partition_dates, read_partition,
                          rejected_by_reason, rejected_share, write_quarantine)

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


# ---------------------------------------------------------------------------------------------
# The bad-input corpus
# ---------------------------------------------------------------------------------------------

@dataclass
class Case:
    files: Callable[[], list[tuple[str, pa.Table | bytes]]]
    error: str | None = None                 # expected IngestError text (file-level problems)
    reason: str | None = None                # expected quarantine reason text (row-level problems)
    rejected: int = 0
    valid: int | None = None
    overrides: dict = field(default_factory=dict)
    check: Callable[[object], None] | None = None


def _kept_exact(ids: list[str]) -> Callable:
    def check(res):
        assert res.valid["user_id"].tolist() == ids
    return check


def _column_is(res, column: str, expected: list) -> None:
    assert res.valid[column].tolist() == expected, res.valid[column].tolist()


def _wide_id_kept_long_id_quarantined_whole(res) -> None:
    assert WIDE_ID in res.valid["user_id"].tolist()
    assert (res.rejected["user_id"].str.len() == 10_000).sum() == 1


def _first_occurrence_kept(res, rejected_rows: list[int]) -> None:
    assert sorted(res.rejected["input_row"].tolist()) == rejected_rows


def _ids_normalised(res) -> None:
    assert res.valid["user_id"].tolist() == ["7", "-1"]
    assert res.valid["item_id"].tolist() == ["123", "0"]


def _times_and_ratings_cast(res) -> None:
    assert res.valid["event_time"].tolist() == [pd.Timestamp(T0)] * 3
    assert res.valid["rating"].tolist() == [3.0, 4.0, 5.0]


ODD_IDS = ["<script>alert('x')</script>", 'O\'Brien "the reader"', "名前-é-ß", "📚 audio; DROP TABLE", " padded "]
# 200 characters but 600 bytes: the length rule counts characters.
WIDE_ID = "館" * 200

CASES = {
    "rating_nan": Case(lambda: [("p.parquet", table(good(3) + [("m", "t", float("nan"), T0, "organic")]))],
                       reason="rating is NaN or infinite", rejected=1, valid=3),
    "rating_inf": Case(lambda: [("p.parquet", table(good(3) + [("m", "t", float("inf"), T0, "organic"),
                                                               ("m", "t", float("-inf"), T0, "probe")]))],
                       reason="rating is NaN or infinite", rejected=2, valid=3),
    "rating_null": Case(lambda: [("p.parquet", table(good(2) + [("m", "t", None, T0, "organic")]))],
                        reason="rating is missing", rejected=1, valid=2),
    "rating_off_scale": Case(lambda: [("p.parquet", table(good(2) + [("m", "t", 6.0, T0, "organic"),
                                                                     ("m", "u", 0.0, T0, "organic"),
                                                                     ("m", "v", -3.0, T0, "probe")]))],
                             reason="rating outside the scale [1, 5]", rejected=3, valid=2),
    "rating_off_step": Case(lambda: [("p.parquet", table(good(2) + [("m", "t", 3.5, T0, "organic"),
                                                                    ("m", "u", 4.01, T0, "organic")]))],
                            reason="rating not on the scale's step of 1", rejected=2, valid=2),
    "rating_as_text": Case(lambda: [("p.parquet", table([("m1", "t", "4", T0, "organic"),
                                                         ("m2", "t", " 2.0 ", T0, "organic"),
                                                         ("m3", "t", "four", T0, "organic"),
                                                         ("m4", "t", "4 stars", T0, "organic")],
                                                        rating=pa.string()))],
                           reason="rating is not a number", rejected=2, valid=2,
                           check=lambda res: _column_is(res, "rating", [4.0, 2.0])),
    "rating_as_int": Case(lambda: [("p.parquet", table([("m1", "t", 4, T0, "organic"),
                                                        ("m2", "t", 9, T0, "organic")], rating=pa.int32()))],
                          reason="rating outside the scale", rejected=1, valid=1),
    "unknown_source_label": Case(lambda: [("p.parquet", table(good(2) + [("m", "t", 3.0, T0, "promo"),
                                                                         ("m", "u", 3.0, T0, "Organic"),
                                                                         ("m", "v", 3.0, T0, None)]))],
                                 reason="source label not recognised", rejected=3, valid=2),
    "null_user_id": Case(lambda: [("p.parquet", table(good(2) + [(None, "t", 3.0, T0, "organic")]))],
                         reason="user_id is missing or empty", rejected=1, valid=2),
    "empty_item_id": Case(lambda: [("p.parquet", table(good(2) + [("m", "", 3.0, T0, "organic")]))],
                          reason="item_id is missing or empty", rejected=1, valid=2),
    "huge_id": Case(lambda: [("p.parquet", table(good(1) + [("x" * 10_000, "t", 3.0, T0, "organic"),
                                                            ("m", "y" * 257, 3.0, T0, "organic"),
                                                            (WIDE_ID, "t", 3.0, T0, "organic")]))],
                    reason="longer than 256 characters", rejected=2, valid=2,
                    check=_wide_id_kept_long_id_quarantined_whole),
    "odd_characters_kept": Case(lambda: [("p.parquet", table([(i, "t", 3.0, T0, "organic") for i in ODD_IDS]))],
                                rejected=0, valid=len(ODD_IDS), check=_kept_exact(ODD_IDS)),
    "integer_ids_normalised": Case(lambda: [("p.parquet", table([(7, 123, 3.0, T0, "organic"),
                                                                 (-1, 0, 4.0, T0, "probe")],
                                                                user_id=pa.int64(), item_id=pa.int32()))],
                                   rejected=0, valid=2,
                                   check=_ids_normalised),
    "float_ids": Case(lambda: [("p.parquet", table([(7.0, "t", 3.0, T0, "organic"),
                                                    (7.5, "t", 3.0, T0, "organic")], user_id=pa.float64()))],
                      reason="user_id is neither text nor a whole number", rejected=1, valid=1,
                      check=_kept_exact(["7"])),
    "future_timestamp": Case(lambda: [("p.parquet", table(good(2) + [("m", "t", 3.0, utc("2100-01-01T00:00:00"),
                                                                      "organic")]))],
                             reason="after the end of the run date (input.max_future_seconds)", rejected=1, valid=2),
    "wrong_day_partition": Case(lambda: [("p.parquet", table([(f"m{k}", "t", 3.0, utc("2026-10-31T12:00:00"),
                                                               "organic") for k in range(3)]))],
                                reason="before the partition date by more than input.max_future_seconds (wrong-day partition)",
                                rejected=3, valid=0),
    "timestamp_text_unparseable": Case(
        lambda: [("p.parquet", table([("m1", "t", 3.0, "2026-11-01T10:00:00Z", "organic"),
                                      ("m2", "t", 3.0, "2026-11-01 11:00:00+01:00", "organic"),
                                      ("m3", "t", 3.0, "yesterday", "organic"),
                                      ("m4", "t", 3.0, "", "organic")], event_time=pa.string()))],
        reason="event_time is not a readable timestamp", rejected=2, valid=2,
        check=lambda res: _column_is(res, "event_time", [pd.Timestamp("2026-11-01T10:00:00Z")] * 2)),
    "timestamp_null": Case(lambda: [("p.parquet", table(good(1) + [("m", "t", 3.0, None, "organic")]))],
                           reason="event_time is missing", rejected=1, valid=1),
    "timestamp_naive_and_ns": Case(lambda: [("p.parquet", table([("m", "t", 3.0, dt.datetime(2026, 11, 1, 23, 59),
                                                                  "organic")], event_time=pa.timestamp("ns")))],
                                   rejected=0, valid=1),
    "duplicate_events": Case(lambda: [("a.parquet", table(good(3) + good(1))),
                                      ("b.parquet", table(good(2)))],
                             reason=DUPLICATE, rejected=3, valid=3,
                             check=lambda res: _first_occurrence_kept(res, [0, 1, 3])),
    "same_time_different_rating_not_duplicate": Case(
        lambda: [("p.parquet", table([("m", "t", 3.0, T0, "organic"), ("m", "t", 4.0, T0, "organic"),
                                      ("m", "t", 3.0, T0, "probe")]))],
        rejected=0, valid=3),
    "several_reasons_listed": Case(lambda: [("p.parquet", table([(None, "t", 9.0, T0, "promo")]))],
                                   reason="user_id is missing or empty; rating outside the scale [1, 5] "
                                          "(scale.min, scale.max); source label not recognised",
                                   rejected=1, valid=0),
    "other_arrow_types_cast_safely": Case(
        lambda: [("p.parquet", pa.table({
            "user_id": pa.array(["m1", "m2", "m3"]).dictionary_encode(),
            "item_id": pa.array(["t1", "t2", "t3"], pa.large_string()),
            "rating": pa.array([3, 4, 5], pa.int8()),
            # 11:00 in Berlin is 10:00 UTC; a plain date means midnight UTC.
            "event_time": pa.array([T0, T0, T0], pa.timestamp("s", tz="Europe/Berlin")),
            "source": pa.array(["organic", "probe", "organic"]).dictionary_encode()}))],
        rejected=0, valid=3,
        check=_times_and_ratings_cast),
    "date_column": Case(lambda: [("p.parquet", table([("m1", "t", 3.0, dt.date(2026, 11, 1), "organic"),
                                                      ("m2", "t", 3.0, dt.date(2026, 10, 30), "organic")],
                                                     event_time=pa.date32()))],
                        reason="wrong-day partition", rejected=1, valid=1),
    "rating_text_overflow": Case(lambda: [("p.parquet", table([("m", "t", "1e400", T0, "organic"),
                                                               ("m", "u", "nan", T0, "organic")],
                                                              rating=pa.string()))],
                                 reason="rating is", rejected=2, valid=0),
    "all_null_columns": Case(lambda: [("p.parquet", pa.table({c: pa.nulls(2) for c in COLS}))],
                             reason="user_id is missing or empty; item_id is missing or empty; rating is missing",
                             rejected=2, valid=0),
    "ids_not_utf8": Case(lambda: [("p.parquet", table([(b"\xff\xfe", "t", 3.0, T0, "organic")],
                                                     user_id=pa.binary()))],
                         error="column 'user_id' (input.columns.user_id) holds bytes that are not UTF-8"),
    "empty_file_zero_rows": Case(lambda: [("empty.parquet", table([])), ("p.parquet", table(good(2)))],
                                 rejected=0, valid=2),
    # File-level problems: a clear IngestError naming the file and, where it applies, the column.
    "zero_byte_file": Case(lambda: [("ok.parquet", table(good(2))), ("zero.parquet", b"")],
                           error="zero.parquet: file is empty (0 bytes)"),
    "truncated_parquet": Case(lambda: [("cut.parquet", parquet_bytes(table(good(50)))[:-40])],
                              error="cut.parquet: not a readable Parquet file, corrupt or truncated"),
    "cut_in_half": Case(lambda: [("half.parquet", (lambda b: b[:len(b) // 2])(parquet_bytes(table(good(500)))))],
                        error="half.parquet: not a readable Parquet file"),
    "not_parquet_at_all": Case(lambda: [("text.parquet", b"user_id,item_id\nm,t\n")],
                               error="text.parquet: not a readable Parquet file"),
    "missing_column": Case(lambda: [("p.parquet", table(good(2)).drop_columns(["rating"]))],
                           error="p.parquet: missing required column 'rating' (input.columns.rating)"),
    "event_time_as_integer": Case(lambda: [("p.parquet", table([("m", "t", 3.0, 1_793_000_000, "organic")],
                                                              event_time=pa.int64()))],
                                  error="column 'event_time' (input.columns.event_time) has type int64"),
    "rating_as_bool": Case(lambda: [("p.parquet", table([("m", "t", True, T0, "organic")], rating=pa.bool_()))],
                           error="column 'rating' (input.columns.rating) has type bool"),
    # Configured names and labels.
    "column_mapping_and_labels": Case(
        lambda: [("p.parquet", table([("m1", "t1", 5.0, T0, "feed"), ("m2", "t2", 2.0, T0, "card"),
                                      ("m3", "t3", 2.0, T0, "organic")],
                                     names=["member", "title", "stars", "ts", "origin"]))],
        overrides={"input.columns": {"user_id": "member", "item_id": "title", "rating": "stars",
                                     "event_time": "ts", "source": "origin"},
                   "input.organic_label": "feed", "input.probe_label": "card"},
        reason="source label not recognised (expected 'feed' or 'card'", rejected=1, valid=2,
        check=lambda res: _column_is(res, "source", [schemas.ORGANIC, schemas.PROBE])),
    "mapped_column_missing": Case(lambda: [("p.parquet", table(good(1)))],
                                  overrides={"input.columns": {"user_id": "member", "item_id": "item_id",
                                                               "rating": "rating", "event_time": "event_time",
                                                               "source": "source"}},
                                  error="missing required column 'member' (input.columns.user_id)"),
    "continuous_scale": Case(lambda: [("p.parquet", table([("m", "t", 3.7, T0, "organic"),
                                                           ("m", "u", 0.5, T0, "organic")]))],
                             overrides={"scale.step": 0.0, "scale.min": 1.0, "scale.max": 5.0},
                             reason="rating outside the scale [1, 5]", rejected=1, valid=1),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_corpus(name: str, logs: Path) -> None:
    case = CASES[name]
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


# ---------------------------------------------------------------------------------------------
# Partition handling
# ---------------------------------------------------------------------------------------------

def test_missing_partition_is_an_error_naming_the_path(logs: Path, cfg: Config) -> None:
    with pytest.raises(IngestError, match=r"partition not found: .*dt=2026-11-01"):
        read_partition(str(logs), DAY, cfg)


def test_missing_partition_skipped_when_configured(logs: Path) -> None:
    cfg = Config().updated({"input.missing_partition": "skip"})
    res = read_partition(str(logs), DAY, cfg)
    assert res.missing and res.rows_read == 0 and res.valid.empty and res.rejected.empty
    assert list(res.valid.columns) == schemas.STORE.names
    assert list(res.rejected.columns) == schemas.QUARANTINE.names


def test_partition_without_parquet_files(logs: Path, cfg: Config) -> None:
    (logs / f"dt={DAY}").mkdir()
    (logs / f"dt={DAY}" / "export.csv").write_text("user_id\n")
    with pytest.raises(IngestError, match=r"holds no \*\.parquet files.*export\.csv"):
        read_partition(str(logs), DAY, cfg)


def test_hidden_and_underscore_entries_are_ignored(logs: Path, cfg: Config) -> None:
    write(logs, table(good(2)))
    write(logs, b"garbage", name="_SUCCESS")
    write(logs, b"garbage", name=".part-1.parquet.tmp")
    write(logs, b"garbage", name="_truth/members.parquet")
    write(logs, b"garbage", name="notes.txt")
    (logs / "_truth").mkdir()
    res = read_partition(str(logs), DAY, cfg)
    assert res.rows_read == 2 and len(res.files) == 1
    assert [Path(p).name for p in res.ignored] == ["notes.txt"]
    assert list_partition_dates(str(logs)) == [DAY]


def test_bad_run_date_is_rejected(logs: Path, cfg: Config) -> None:
    with pytest.raises(DateError, match="not a calendar date"):
        read_partition(str(logs), "2026-13-01", cfg)
    with pytest.raises(DateError, match="not of the form YYYY-MM-DD"):
        read_partition(str(logs), "2026/11/01", cfg)


def test_unreadable_file_error_keeps_the_cause(logs: Path, cfg: Config) -> None:
    write(logs, b"PAR1" + b"\0" * 100 + b"PAR1")
    with pytest.raises(IngestError) as err:
        read_partition(str(logs), DAY, cfg)
    assert "part-0.parquet" in str(err.value)
    assert err.value.__cause__ is not None   # the pyarrow error stays attached for debugging


# ---------------------------------------------------------------------------------------------
# Result contents
# ---------------------------------------------------------------------------------------------

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
    # Reference: hashlib.sha256 over the file's bytes.
    assert res.files == [{"path": str(p), "size": p.stat().st_size,
                          "sha256": hashlib.sha256(p.read_bytes()).hexdigest()}]


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


def test_unsorted_input_duplicates_found(logs: Path, cfg: Config) -> None:
    rows = good(6)[::-1] + [good(6)[2]]     # time order reversed: the sort-based path is used
    write(logs, table(rows))
    res = read_partition(str(logs), DAY, cfg)
    assert res.rejected["reason"].tolist() == [DUPLICATE]
    assert res.rejected["input_row"].tolist() == [6]


def test_large_partition_is_vectorised(logs: Path, cfg: Config) -> None:
    """200k rows with a sprinkle of bad ones: right counts (a per-row Python loop would also take seconds)."""
    n = 200_000
    rng = np.random.default_rng(3)
    times = np.sort(rng.integers(0, 86_400_000_000, n)) + int(T0.replace(hour=0).timestamp() * 1_000_000)
    rating = rng.integers(1, 6, n).astype(float)
    rating[::1000] = 7.0
    t = pa.table({"user_id": pa.array([f"member-{k % 5000:06d}" for k in range(n)]),
                  "item_id": pa.array([f"title-{k % 777:06d}" for k in range(n)]),
                  "rating": rating, "event_time": pa.array(times, pa.timestamp("us", tz="UTC")),
                  "source": pa.array(np.where(rng.random(n) < 0.03, "probe", "organic"))})
    write(logs, t)
    res = read_partition(str(logs), DAY, cfg)
    assert len(res.rejected) == n // 1000 and len(res.valid) == n - n // 1000


# ---------------------------------------------------------------------------------------------
# Rejected share and quarantine file
# ---------------------------------------------------------------------------------------------

def test_rejected_share_gate(logs: Path, cfg: Config) -> None:
    write(logs, table(good(18) + [("m", "t", 9.0, T0, "organic"), ("m", "u", 3.0, T0, "promo")]))
    res = read_partition(str(logs), DAY, cfg)
    assert rejected_share(res) == pytest.approx(0.1)
    expected = {"rating outside the scale [1, 5] (scale.min, scale.max)": 1,
                "source label not recognised (expected 'organic' or 'probe', see input.organic_label and "
                "input.probe_label)": 1}
    assert rejected_by_reason(res.rejected) == expected
    assert res.reason_counts == expected
    with pytest.raises(IngestError, match=r"2 of 20 rows rejected \(10\.0%\), above input\.max_rejected_share") as e:
        check_rejected_share(res, cfg)
    assert "rating outside the scale" in str(e.value) and "source label not recognised" in str(e.value)
    check_rejected_share(res, cfg.updated({"input.max_rejected_share": 0.1}))   # at the limit: passes


def test_write_quarantine_is_idempotent(logs: Path, cfg: Config, ws) -> None:
    write(logs, table(good(3) + [("m", "t", 9.0, T0, "organic")]))
    res = read_partition(str(logs), DAY, cfg)
    path = Path(write_quarantine(ws, DAY, res.rejected))
    write_quarantine(ws, DAY, res.rejected)
    back = pq.read_table(path)
    assert back.schema.equals(schemas.QUARANTINE, check_metadata=False)
    assert back.num_rows == 1
    assert sorted(p.name for p in path.parent.iterdir()) == ["part-0.parquet"]   # no temp files left
    write_quarantine(ws, DAY, res.rejected.iloc[0:0])     # a clean re-run clears the date
    assert pq.read_table(path).num_rows == 0


def test_logs_given_as_a_uri_go_through_pyarrow_fs(logs: Path, cfg: Config) -> None:
    write(logs, table(good(3)))
    res = read_partition(logs.as_uri(), DAY, cfg)      # file:///... resolved by pyarrow.fs
    assert res.rows_valid == 3
    assert list_partition_dates(logs.as_uri()) == [DAY]


def test_events_within_the_allowance_around_the_day_are_kept(logs: Path) -> None:
    """A buffer flushed just after midnight puts a few events into the neighbouring partition: kept
    within input.max_future_seconds either side, quarantined beyond it."""
    cfg = Config().updated({"input.max_future_seconds": 600})
    rows = [("m1", "t", 3.0, utc("2026-10-31T23:55:00"), "organic"),   # 5 min early: kept
            ("m2", "t", 3.0, utc("2026-11-02T00:05:00"), "organic"),   # 5 min late: kept
            ("m3", "t", 3.0, utc("2026-10-31T23:00:00"), "organic"),   # an hour early: wrong day
            ("m4", "t", 3.0, utc("2026-11-02T01:00:00"), "organic")]   # an hour late: future
    write(logs, table(rows))
    res = read_partition(str(logs), DAY, cfg)
    assert sorted(res.valid["user_id"]) == ["m1", "m2"]
    reasons = dict(zip(res.rejected["user_id"], res.rejected["reason"]))
    assert "wrong-day" in reasons["m3"] and "after the end of the run date" in reasons["m4"]
