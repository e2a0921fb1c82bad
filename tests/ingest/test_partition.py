"""Listing a day's partition (tasks/ingest/partition.py): missing, empty or hidden entries, bad dates,
the dates a logs folder holds. Real folders under tmp_path."""

from __future__ import annotations

from pathlib import Path

import pytest
from log_files import DAY, good, table, write

from tasks import schemas
from tasks.config import Config
from tasks.dates import DateError
from tasks.ingest.logs import IngestError, list_partition_dates, read_partition


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


def test_partition_dates_of_a_uri(logs: Path) -> None:
    write(logs, table(good(3)))
    assert list_partition_dates(logs.as_uri()) == [DAY]      # file:///... resolved by pyarrow.fs


def test_dangling_symlink_is_an_error_naming_it(logs: Path, cfg: Config) -> None:
    """A link whose target is gone (a file moved by an upstream job) would silently drop its rows."""
    write(logs, table(good(2)))
    (logs / f"dt={DAY}" / "part-1.parquet").symlink_to(logs / "moved-away.parquet")
    with pytest.raises(IngestError, match=r"dangling symlink .*dt=2026-11-01/part-1\.parquet -> .*moved-away\.parquet"):
        read_partition(str(logs), DAY, cfg)


def test_links_that_resolve_are_read_and_hidden_dangling_ones_ignored(logs: Path, cfg: Config) -> None:
    """A working link is read like a file; a dangling hidden one (an editor's ``.#name`` lock) is skipped
    like every hidden entry."""
    target = write(logs, table(good(3)), day="2026-10-31")
    (logs / f"dt={DAY}").mkdir()
    (logs / f"dt={DAY}" / "linked.parquet").symlink_to(target)
    (logs / f"dt={DAY}" / ".#linked.parquet").symlink_to(logs / "nowhere")
    res = read_partition(str(logs), DAY, cfg)
    assert res.rows_read == 3 and [Path(f["path"]).name for f in res.files] == ["linked.parquet"]


def test_a_missing_logs_folder_is_an_error_even_when_missing_days_are_skipped(tmp_path: Path) -> None:
    """A misspelt logs path is not a quiet day: "skip" applies to a day's partition, never to the folder,
    and the message does not suggest it."""
    for policy in ("error", "skip"):
        cfg = Config().updated({"input.missing_partition": policy})
        with pytest.raises(IngestError, match=r"logs folder not found: .*no-such-folder") as info:
            read_partition(str(tmp_path / "no-such-folder"), DAY, cfg)
        assert "missing_partition" not in str(info.value)
    with pytest.raises(IngestError, match="logs folder not found"):
        list_partition_dates(str(tmp_path / "no-such-folder"))


def test_a_missing_day_in_an_existing_folder_says_so(logs: Path, cfg: Config) -> None:
    with pytest.raises(IngestError, match="the logs folder exists") as info:
        read_partition(str(logs), DAY, cfg)
    assert "logs folder not found" not in str(info.value)
