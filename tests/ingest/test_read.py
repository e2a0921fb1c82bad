"""One log file (tasks/ingest/read.py): bytes, checksum, Parquet decode and the configured columns' presence.
File-level problems raise an IngestError naming the file and, where it applies, the column."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from log_files import DAY, Case, good, parquet_bytes, run_case, table, write

from tasks.config import Config
from tasks.ingest.logs import IngestError, read_partition

CASES = {
    "empty_file_zero_rows": Case(lambda: [("empty.parquet", table([])), ("p.parquet", table(good(2)))],
                                 rejected=0, valid=2),
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
    "mapped_column_missing": Case(lambda: [("p.parquet", table(good(1)))],
                                  overrides={"input.columns": {"user_id": "member", "item_id": "item_id",
                                                               "rating": "rating", "event_time": "event_time",
                                                               "source": "source"}},
                                  error="missing required column 'member' (input.columns.user_id)"),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_corpus(name: str, logs: Path) -> None:
    run_case(CASES[name], logs)


def test_unreadable_file_error_keeps_the_cause(logs: Path, cfg: Config) -> None:
    write(logs, b"PAR1" + b"\0" * 100 + b"PAR1")
    with pytest.raises(IngestError) as err:
        read_partition(str(logs), DAY, cfg)
    assert "part-0.parquet" in str(err.value)
    assert err.value.__cause__ is not None   # the pyarrow error stays attached for debugging


def test_each_file_is_described_by_path_size_and_checksum(logs: Path, cfg: Config) -> None:
    b = write(logs, table(good(2, start=10)), "b.parquet")
    a = write(logs, table(good(3)), "a.parquet")
    res = read_partition(str(logs), DAY, cfg)
    # Reference: hashlib.sha256 over each file's bytes; files sorted by path.
    assert res.files == [{"path": str(p), "size": p.stat().st_size,
                          "sha256": hashlib.sha256(p.read_bytes()).hexdigest()} for p in (a, b)]


def test_logs_given_as_a_uri_go_through_pyarrow_fs(logs: Path, cfg: Config) -> None:
    write(logs, table(good(3)))
    res = read_partition(logs.as_uri(), DAY, cfg)      # file:///... resolved by pyarrow.fs
    assert res.rows_valid == 3
