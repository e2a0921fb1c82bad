"""Row checks and their reasons (tasks/ingest/rows.py): each rule quarantines exactly the rows that break
it, with its fixed phrase; duplicates are found across files and in any order. Real Parquet files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from log_files import DAY, T0, Case, good, run_case, table, utc, write

from tasks.config import Config
from tasks.ingest.logs import DUPLICATE, read_partition
from tasks.ingest.rows import ORDER, REASON_SEP, reason_phrases


def _wide_id_kept_long_id_quarantined_whole(res) -> None:
    assert WIDE_ID in res.valid["user_id"].tolist()
    assert (res.rejected["user_id"].str.len() == 10_000).sum() == 1


def _first_occurrence_kept(res, rejected_rows: list[int]) -> None:
    assert sorted(res.rejected["input_row"].tolist()) == rejected_rows


def _reasons_are(res, reasons: list[str]) -> None:
    assert res.rejected.sort_values("input_row")["reason"].tolist() == reasons


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
    "continuous_scale": Case(lambda: [("p.parquet", table([("m", "t", 3.7, T0, "organic"),
                                                           ("m", "u", 0.5, T0, "organic")]))],
                             overrides={"scale.step": 0.0, "scale.min": 1.0, "scale.max": 5.0},
                             reason="rating outside the scale [1, 5]", rejected=1, valid=1),
    "unknown_source_label": Case(lambda: [("p.parquet", table(good(2) + [("m", "t", 3.0, T0, "promo"),
                                                                         ("m", "u", 3.0, T0, "Organic"),
                                                                         ("m", "v", 3.0, T0, None)]))],
                                 reason="source label not recognised", rejected=3, valid=2),
    "null_user_id": Case(lambda: [("p.parquet", table(good(2) + [(None, "t", 3.0, T0, "organic")]))],
                         reason="user_id is missing or empty", rejected=1, valid=2),
    "empty_item_id": Case(lambda: [("p.parquet", table(good(2) + [("m", "", 3.0, T0, "organic")]))],
                          reason="item_id is missing or empty", rejected=1, valid=2),
    # Ids of blanks only are as empty as "": an upstream bug that blanks ids must not make one phantom
    # member (or title) out of every such row.
    "blank_ids": Case(lambda: [("p.parquet", table(good(2) + [("   ", "t", 3.0, T0, "organic"),
                                                              ("\t\n", "u", 3.0, T0, "organic"),
                                                              ("\u00a0", "v", 3.0, T0, "probe"),
                                                              ("m", " ", 3.0, T0, "organic")]))],
                      reason="is missing or empty", rejected=4, valid=2,
                      check=lambda res: _reasons_are(res, ["user_id is missing or empty"] * 3 +
                                                     ["item_id is missing or empty"])),
    # Real ids with blanks at either end are refused, not trimmed: trimming would merge them silently into
    # the member without blanks, keeping them would make a second, phantom member.
    "blank_padded_ids": Case(lambda: [("p.parquet", table(good(2) + [(" member-000000", "t", 3.0, T0, "organic"),
                                                                     ("member-000000\t", "u", 3.0, T0, "organic"),
                                                                     ("m", "title-000001 ", 3.0, T0, "organic"),
                                                                     ("m", "title one", 3.0, T0, "organic")]))],
                             reason="blanks at its start or end", rejected=3, valid=3,
                             check=lambda res: _reasons_are(res, [
                                 "user_id has blanks at its start or end (ids are compared exactly, blanks too)"]
                                 * 2 + ["item_id has blanks at its start or end (ids are compared exactly, blanks "
                                        "too)"])),
    "huge_id": Case(lambda: [("p.parquet", table(good(1) + [("x" * 10_000, "t", 3.0, T0, "organic"),
                                                            ("m", "y" * 257, 3.0, T0, "organic"),
                                                            (WIDE_ID, "t", 3.0, T0, "organic")]))],
                    reason="longer than 256 characters", rejected=2, valid=2,
                    check=_wide_id_kept_long_id_quarantined_whole),
    "future_timestamp": Case(lambda: [("p.parquet", table(good(2) + [("m", "t", 3.0, utc("2100-01-01T00:00:00"),
                                                                      "organic")]))],
                             reason="after the end of the run date (input.max_future_seconds)", rejected=1, valid=2),
    "wrong_day_partition": Case(lambda: [("p.parquet", table([(f"m{k}", "t", 3.0, utc("2026-10-31T12:00:00"),
                                                               "organic") for k in range(3)]))],
                                reason="before the partition date by more than input.max_future_seconds "
                                       "(wrong-day partition)",
                                rejected=3, valid=0),
    "timestamp_null": Case(lambda: [("p.parquet", table(good(1) + [("m", "t", 3.0, None, "organic")]))],
                           reason="event_time is missing", rejected=1, valid=1),
    "several_reasons_listed": Case(lambda: [("p.parquet", table([(None, "t", 9.0, T0, "promo")]))],
                                   reason="user_id is missing or empty; rating outside the scale [1, 5] "
                                          "(scale.min, scale.max); source label not recognised",
                                   rejected=1, valid=0),
    "duplicate_events": Case(lambda: [("a.parquet", table(good(3) + good(1))),
                                      ("b.parquet", table(good(2)))],
                             reason=DUPLICATE, rejected=3, valid=3,
                             check=lambda res: _first_occurrence_kept(res, [0, 1, 3])),
    "same_time_different_rating_not_duplicate": Case(
        lambda: [("p.parquet", table([("m", "t", 3.0, T0, "organic"), ("m", "t", 4.0, T0, "organic"),
                                      ("m", "t", 3.0, T0, "probe")]))],
        rejected=0, valid=3),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_corpus(name: str, logs: Path) -> None:
    run_case(CASES[name], logs)


def test_unsorted_input_duplicates_found(logs: Path, cfg: Config) -> None:
    rows = good(6)[::-1] + [good(6)[2]]     # time order reversed: the sort-based path is used
    write(logs, table(rows))
    res = read_partition(str(logs), DAY, cfg)
    assert res.rejected["reason"].tolist() == [DUPLICATE]
    assert res.rejected["input_row"].tolist() == [6]


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


def test_every_reason_key_has_a_phrase_that_splits_back(cfg: Config) -> None:
    """Counting by reason splits a row's reasons on the separator: no phrase may contain it."""
    phrases = reason_phrases(cfg)
    assert list(phrases) == ORDER
    assert len(set(phrases.values())) == len(ORDER)
    assert not [p for p in phrases.values() if REASON_SEP in p]
