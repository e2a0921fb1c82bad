"""Typed column coercion (tasks/ingest/columns.py): every input type a column may have, converted or
refused with the file, column and config key named. Real Parquet files through the ingest's read path."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Callable

import pandas as pd
import pyarrow as pa
import pytest
from log_files import COLS, T0, Case, column_is, run_case, table


def _kept_exact(ids: list[str]) -> Callable:
    def check(res):
        assert res.valid["user_id"].tolist() == ids
    return check


def _ids_normalised(res) -> None:
    assert res.valid["user_id"].tolist() == ["7", "-1"]
    assert res.valid["item_id"].tolist() == ["123", "0"]


def _times_and_ratings_cast(res) -> None:
    assert res.valid["event_time"].tolist() == [pd.Timestamp(T0)] * 3
    assert res.valid["rating"].tolist() == [3.0, 4.0, 5.0]


ODD_IDS = ["<script>alert('x')</script>", 'O\'Brien "the reader"', "名前-é-ß", "📚 audio; DROP TABLE", "inner  blanks"]


CASES = {
    "rating_as_text": Case(lambda: [("p.parquet", table([("m1", "t", "4", T0, "organic"),
                                                         ("m2", "t", " 2.0 ", T0, "organic"),
                                                         ("m3", "t", "four", T0, "organic"),
                                                         ("m4", "t", "4 stars", T0, "organic")],
                                                        rating=pa.string()))],
                           reason="rating is not a number", rejected=2, valid=2,
                           check=lambda res: column_is(res, "rating", [4.0, 2.0])),
    "rating_as_int": Case(lambda: [("p.parquet", table([("m1", "t", 4, T0, "organic"),
                                                        ("m2", "t", 9, T0, "organic")], rating=pa.int32()))],
                          reason="rating outside the scale", rejected=1, valid=1),
    "rating_text_overflow": Case(lambda: [("p.parquet", table([("m", "t", "1e400", T0, "organic"),
                                                               ("m", "u", "nan", T0, "organic")],
                                                              rating=pa.string()))],
                                 reason="rating is", rejected=2, valid=0),
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
    "timestamp_text_unparseable": Case(
        lambda: [("p.parquet", table([("m1", "t", 3.0, "2026-11-01T10:00:00Z", "organic"),
                                      ("m2", "t", 3.0, "2026-11-01 11:00:00+01:00", "organic"),
                                      ("m3", "t", 3.0, "yesterday", "organic"),
                                      ("m4", "t", 3.0, "", "organic")], event_time=pa.string()))],
        reason="event_time is not a readable timestamp", rejected=2, valid=2,
        check=lambda res: column_is(res, "event_time", [pd.Timestamp("2026-11-01T10:00:00Z")] * 2)),
    "timestamp_naive_and_ns": Case(lambda: [("p.parquet", table([("m", "t", 3.0, dt.datetime(2026, 11, 1, 23, 59),
                                                                  "organic")], event_time=pa.timestamp("ns")))],
                                   rejected=0, valid=1),
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
    "all_null_columns": Case(lambda: [("p.parquet", pa.table({c: pa.nulls(2) for c in COLS}))],
                             reason="user_id is missing or empty; item_id is missing or empty; rating is missing",
                             rejected=2, valid=0),
    # Types that cannot hold the field at all: a clear IngestError naming the file, column and key.
    "ids_not_utf8": Case(lambda: [("p.parquet", table([(b"\xff\xfe", "t", 3.0, T0, "organic")],
                                                     user_id=pa.binary()))],
                         error="column 'user_id' (input.columns.user_id) holds bytes that are not UTF-8"),
    "event_time_as_integer": Case(lambda: [("p.parquet", table([("m", "t", 3.0, 1_793_000_000, "organic")],
                                                              event_time=pa.int64()))],
                                  error="column 'event_time' (input.columns.event_time) has type int64"),
    "rating_as_bool": Case(lambda: [("p.parquet", table([("m", "t", True, T0, "organic")], rating=pa.bool_()))],
                           error="column 'rating' (input.columns.rating) has type bool"),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_corpus(name: str, logs: Path) -> None:
    run_case(CASES[name], logs)


def test_two_canonical_columns_mapped_to_one_source_column_are_refused() -> None:
    """user = item on every stored row would pass every row check: the config refuses it, naming both keys."""
    from tasks.config import Config, ConfigError, parse_config

    with pytest.raises(ConfigError, match=r"input\.columns\.user_id and input\.columns\.item_id both name the "
                                          r"column 'id'"):
        parse_config({"input": {"columns": {"user_id": "id", "item_id": "id"}}}, source="night.toml")
    with pytest.raises(ConfigError, match=r"input\.columns\.rating and input\.columns\.source both name the "
                                          r"column 'rating'"):
        Config().updated({"input.columns.source": "rating"})
