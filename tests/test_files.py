"""Crash-safe writes (tasks/files.py): a reader sees the old file or the new one, never a torn one, and
a failed write leaves the old file and no temporary behind."""

from __future__ import annotations

import json
import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tasks.files import atomic_write, atomic_write_bytes, atomic_write_json, atomic_write_table, fsync_dir


def test_bytes_json_and_tables_replace_whole_files(tmp_path) -> None:
    target = tmp_path / "deep" / "er" / "f.bin"
    atomic_write_bytes(target, b"one")
    atomic_write_bytes(target, b"two")
    assert target.read_bytes() == b"two"
    atomic_write_json(tmp_path / "p.json", {"b": 1, "a": [1, 2]})
    assert (tmp_path / "p.json").read_text() == json.dumps({"a": [1, 2], "b": 1}, indent=2, sort_keys=True) + "\n"
    table = pa.table({"x": [1, 2, 3]})
    atomic_write_table(tmp_path / "t.parquet", table)
    assert pq.read_table(tmp_path / "t.parquet").equals(table)
    assert pq.ParquetFile(tmp_path / "t.parquet").metadata.row_group(0).column(0).compression == "ZSTD"


def test_a_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path) -> None:
    target = tmp_path / "live.json"
    atomic_write_bytes(target, b"old")

    def half_then_fail(tmp: str) -> None:
        with open(tmp, "wb") as fh:
            fh.write(b"half")
        raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        atomic_write(target, half_then_fail)
    assert target.read_bytes() == b"old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["live.json"]


def test_the_temporary_is_a_dot_file_readers_skip(tmp_path) -> None:
    seen = []
    atomic_write(tmp_path / "part-0.parquet", lambda tmp: seen.append(os.path.basename(tmp)) or open(tmp, "wb").close())
    assert seen[0].startswith(".part-0.parquet.")


def test_fsync_of_a_missing_folder_fails_only_when_required(tmp_path) -> None:
    fsync_dir(tmp_path)
    fsync_dir(tmp_path / "missing", required=False)
    with pytest.raises(OSError):
        fsync_dir(tmp_path / "missing")
