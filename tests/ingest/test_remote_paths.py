"""Logs through ``pyarrow.fs`` URIs; the workspace stays on a (local or shared) POSIX filesystem.

The nightly flow reads its logs through ``tasks.workspace.resolve`` (``pyarrow.fs.FileSystem.from_uri``), so
``file://``, ``s3://`` and ``gs://`` locations take the same code path. Here the real flow runs on a
``file://`` URI; the object-store URIs are checked as far as is possible without a network: they resolve
to pyarrow's S3 and GCS filesystems with the settings the URI carries.
"""

from __future__ import annotations

import hashlib
import json

import pyarrow.fs as pafs
import pyarrow.parquet as pq
import pytest

from tasks.config import Config
from tasks.ingest.logs import list_partition_dates, read_partition
from tasks.ingest.store import write_partition
from tasks.operate.demo_data import generate
from tasks.workspace import Workspace, resolve

DAY = "2026-11-01"


def test_nightly_flow_reads_logs_from_a_file_uri(prefect_harness, tmp_path):
    from flows.nightly import nightly_for

    logs = tmp_path / "logs"
    # Invented demo data (tasks/operate/demo_data.py).
    generate(logs, DAY, days=1, n_members=300, n_titles=150, organic_per_day=2000, seed=9, probe_share=0.2)
    uri = logs.as_uri()
    assert uri.startswith("file:///")
    cfg = Config().updated({"model.dim": 4, "model.max_epochs": 2, "evaluate.bootstrap": 20}) \
        .with_overrides(logs=uri, workspace=str(tmp_path / "ws"))
    out = nightly_for(cfg)(cfg=cfg, run_date=DAY)
    assert out["status"] == "done" and out["counts"]["rows_ingested"] > 2000

    ws = Workspace.at(cfg.paths.workspace)
    # The same day read through a plain path and stored elsewhere: the same rows (input paths aside).
    other = Workspace.at(tmp_path / "other")
    write_partition(other, DAY, read_partition(str(logs), DAY, cfg).valid)
    via_uri = pq.read_table(ws.store / f"dt={DAY}" / "part-0.parquet").drop_columns(["input_file"])
    via_path = pq.read_table(other.store / f"dt={DAY}" / "part-0.parquet").drop_columns(["input_file"])
    assert via_uri.num_rows > 1000 and via_uri.equals(via_path)
    manifest = json.loads((ws.versions / out["version_id"] / "manifest.json").read_text())
    [entry] = manifest["input_files"]
    source = logs / f"dt={DAY}" / "part-0.parquet"
    assert entry["sha256"] == hashlib.sha256(source.read_bytes()).hexdigest()   # reference: hashlib
    assert list_partition_dates(uri) == [DAY]


def test_object_store_uris_resolve_to_pyarrow_filesystems():
    """What a user writes in paths.logs for S3 (or an S3-compatible store) and GCS; no request is made."""
    fs, path = resolve("s3://reading-app-logs/ratings?region=eu-central-1")
    assert isinstance(fs, pafs.S3FileSystem) and path == "reading-app-logs/ratings" and fs.region == "eu-central-1"
    fs, path = resolve("s3://ratings/daily?endpoint_override=127.0.0.1:9000&scheme=http&region=us-east-1")
    assert isinstance(fs, pafs.S3FileSystem) and path == "ratings/daily"
    fs, path = resolve("gs://reading-app-logs/ratings")
    assert isinstance(fs, pafs.GcsFileSystem) and path == "reading-app-logs/ratings"


def test_workspace_on_an_object_store_is_refused_with_the_reason(tmp_path, monkeypatch):
    with pytest.raises(ValueError, match="atomic publish relies on rename"):
        Workspace.at("s3://bucket/tarewise")
    assert Workspace.at((tmp_path / "ws").as_uri()).root == (tmp_path / "ws").resolve()

    from typer.testing import CliRunner

    from flows.cli import app
    monkeypatch.chdir(tmp_path)
    res = CliRunner().invoke(app, ["run", "--date", DAY, "--workspace", "s3://bucket/tarewise"])
    assert res.exit_code == 2
    assert "paths.workspace" in res.output and "logs may live on an object store" in res.output
    assert not (tmp_path / "s3:").exists()           # nothing created locally under a mangled name
