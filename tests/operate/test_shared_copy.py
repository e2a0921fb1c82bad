"""The shared copy (``paths.shared``): store, versions and live pointer on a ``pyarrow.fs`` filesystem.

Real nightly flows write real files; the shared copy is a ``file://`` URI (pyarrow's LocalFileSystem)
or, for the code path that object stores take (one direct write per object, no rename), a
``pyarrow.fs.SubTreeFileSystem``. The kill in the crash case is a real SIGKILL (tasks/failpoints.py).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pyarrow.fs as pafs
import pyarrow.parquet as pq
import pytest

from handmade import PROMOTE_ALL, promote_all_demo_config
from tasks.config import ConfigError, load_config
from tasks.operate import shared_copy as sc
from tasks.operate import shared_restore as sr
from tasks.publish import versions
from tasks.workspace import Workspace

from conftest import REPO

NIGHTS = ["2026-11-01", "2026-11-02", "2026-11-03"]


def _cfg(tmp_path: Path, ws: str, shared: str | None, **settings):
    cfg = load_config(REPO / "configs" / "demo.toml", logs=str(REPO / "sample_parquet"),
                      workspace=str(tmp_path / ws), shared=shared if shared is not None else "")
    return cfg.updated({**PROMOTE_ALL, **settings})


def _night(cfg, day):
    from flows.nightly import nightly_for
    return nightly_for(cfg)(cfg=cfg, run_date=day)


def _tree(root: Path) -> dict[str, bytes]:
    """Every file under ``root`` (hidden ones skipped): relative path -> bytes."""
    out = {}
    for p in root.rglob("*"):
        rel = p.relative_to(root)
        if p.is_file() and not any(part.startswith(".") for part in rel.parts):
            out[rel.as_posix()] = p.read_bytes()
    return out


def _local_tree(ws: Workspace) -> dict[str, bytes]:
    return {rel: (ws.root / rel).read_bytes() for rel in sc.local_files(ws)}


@pytest.fixture(scope="module")
def first_night(prefect_harness, tmp_path_factory):
    """Workspace A after night 1 with a shared copy S (a file:// URI); tests copy both before changing them."""
    root = tmp_path_factory.mktemp("shared-base")
    cfg = _cfg(root, "ws-a", (root / "shared").as_uri())
    out = _night(cfg, NIGHTS[0])
    assert out["status"] == "done" and out["state"] == "live"
    return root


def _copy_base(first_night: Path, tmp_path: Path) -> str:
    import shutil
    shutil.copytree(first_night / "ws-a", tmp_path / "ws-a")
    shutil.copytree(first_night / "shared", tmp_path / "shared")
    # The journal names the shared copy by URI; the copy lives elsewhere now.
    uri = (tmp_path / "shared").as_uri()
    journal = json.loads((tmp_path / "ws-a" / sc.JOURNAL).read_text())
    (tmp_path / "ws-a" / sc.JOURNAL).write_text(json.dumps(dict(journal, uri=uri)))
    return uri


def test_a_night_leaves_an_exact_copy_and_readers_get_the_live_predictions(first_night):
    ws = Workspace.at(first_night / "ws-a")
    shared = _tree(first_night / "shared")
    local = _local_tree(ws)
    assert {"live.json", "ledger/runs.parquet", "metrics/nightly.parquet"} <= set(shared)
    assert any(k.startswith("store/dt=2026-11-01/") for k in shared)
    assert shared == local                          # same files, same bytes
    assert not any(k.startswith(("prefect-results/", "lock", sc.JOURNAL)) for k in shared)

    live, table = sr.read_live_predictions((first_night / "shared").as_uri())
    assert live == versions.live_version(ws)
    assert table.equals(pq.read_table(ws.versions / live / "predictions.parquet"))


def test_a_second_copy_copies_nothing(first_night, tmp_path):
    uri = _copy_base(first_night, tmp_path)
    ws = Workspace.at(tmp_path / "ws-a")
    target = sc.SharedCopy.at(uri, ws)
    first = sc.push(ws, target)             # the copied tree has new mtimes: re-sent once, then quiet
    again = sc.push(ws, target)
    assert first.live == again.live == versions.live_version(ws)
    assert (again.uploaded, again.deleted) == (0, 0) and sc.plan_push(ws, target).empty
    assert sc.pending_files(ws, uri) == 0


def test_a_fresh_workspace_restores_and_its_next_night_equals_the_original(first_night, tmp_path):
    uri = _copy_base(first_night, tmp_path)
    # Machine C starts empty with only the shared copy; machine A carries on without one.
    out_c = _night(_cfg(tmp_path, "ws-c", uri), NIGHTS[1])
    out_a = _night(_cfg(tmp_path, "ws-a", ""), NIGHTS[1])
    ws_a, ws_c = Workspace.at(tmp_path / "ws-a"), Workspace.at(tmp_path / "ws-c")

    assert out_c["status"] == out_a["status"] == "done"
    assert out_c["version_id"] == out_a["version_id"]
    # Same store, same base version => the same predictions, byte for byte.
    pa_, pc_ = (w.versions / out_a["version_id"] / "predictions.parquet" for w in (ws_a, ws_c))
    assert pa_.read_bytes() == pc_.read_bytes()
    # C carries A's history: the restored ledger holds A's first night before C's own.
    import pandas as pd
    ledger_c = pd.read_parquet(ws_c.ledger)
    assert list(ledger_c["run_date"]) == NIGHTS[:2] and set(ledger_c["status"]) == {"done"}
    assert sr.read_live_predictions(uri)[0] == out_c["version_id"]

    # A also copied night 1 there, but C has written since: A is refused, naming the fix.
    target = sc.SharedCopy.at(uri, ws_a)
    with pytest.raises(sc.SharedCopyRefused, match="not written by this workspace.*--take-over"):
        sc.push(ws_a, target)
    assert sr.read_live_predictions(uri)[0] == out_c["version_id"]     # untouched
    # Taking over makes the shared copy exactly A's (same version ids: A's files replace C's).
    sc.push(ws_a, target, take_over=True)
    shared = _tree(tmp_path / "shared")
    for rel, data in _local_tree(ws_a).items():
        assert shared[rel] == data, rel
    assert json.loads(shared["live.json"]) == json.loads(ws_a.live_pointer.read_text())


def test_retention_removes_pruned_versions_from_the_shared_copy_never_the_live_one(first_night, tmp_path):
    uri = _copy_base(first_night, tmp_path)
    cfg = _cfg(tmp_path, "ws-a", uri, **{"retention.keep_versions": 1})
    for day in NIGHTS[1:]:
        assert _night(cfg, day)["status"] == "done"
    ws = Workspace.at(tmp_path / "ws-a")
    local = sorted(m["version_id"] for m in versions.list_versions(ws))
    on_shared = sorted(p.name for p in (tmp_path / "shared" / "versions").iterdir())
    assert len(local) < 3                      # retention removed at least one version here ...
    assert on_shared == local                  # ... and there
    assert versions.live_version(ws) in on_shared
    assert _tree(tmp_path / "shared") == _local_tree(ws)

    # A rollback moves the shared pointer too.
    from typer.testing import CliRunner
    from flows.cli import app
    older = next(v for v in local if v != versions.live_version(ws))
    res = CliRunner().invoke(app, ["rollback", "--to", older, "--workspace", str(ws.root), "--shared", uri])
    assert res.exit_code == 0, res.output
    assert sr.read_live_predictions(uri)[0] == versions.live_version(ws) == older


def test_a_night_killed_before_the_pointer_leaves_the_old_live_version_whole(prefect_harness, first_night, tmp_path):
    uri = _copy_base(first_night, tmp_path)
    ws = Workspace.at(tmp_path / "ws-a")
    before = versions.live_version(ws)
    env = dict(os.environ, PREFECT_API_URL=prefect_harness, TAREWISE_FAILPOINT="shared:before-pointer")
    killed = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--date", NIGHTS[1], "--config",
                             str(promote_all_demo_config(tmp_path)), "--logs", str(REPO / "sample_parquet"),
                             "--workspace", str(ws.root), "--shared", uri],
                            cwd=REPO, env=env, capture_output=True, text=True, timeout=600)
    assert killed.returncode == -signal.SIGKILL, killed.stderr[-2000:]
    new = versions.live_version(ws)
    assert new != before                           # the night itself finished here
    # The shared copy's readers still get the previous version, and it is whole there.
    assert sr.read_live_predictions(uri)[0] == before
    shared = _tree(tmp_path / "shared")
    for rel in sc.local_files(ws):
        if rel.startswith(f"versions/{before}/"):
            assert shared[rel] == (ws.root / rel).read_bytes()
    # The next copy finishes the job (here by hand; the next night would do it too).
    from typer.testing import CliRunner
    from flows.cli import app
    res = CliRunner().invoke(app, ["share", "--workspace", str(ws.root), "--shared", uri])
    assert res.exit_code == 0, res.output
    assert sr.read_live_predictions(uri)[0] == new
    assert _tree(tmp_path / "shared") == _local_tree(ws)


def test_the_object_store_path_round_trips_and_restore_skips_partial_versions(first_night, tmp_path):
    """Through a SubTreeFileSystem the copy takes the branch object stores take (one direct write per
    object, parent folders on demand, no rename)."""
    ws = Workspace.at(first_night / "ws-a")
    (tmp_path / "bucket").mkdir()
    fs = pafs.SubTreeFileSystem(str(tmp_path / "bucket"), pafs.LocalFileSystem())
    assert fs.type_name != "local"
    target = sc.SharedCopy("subtree-test", fs, "tarewise")
    import shutil
    scratch = Workspace.at(tmp_path / "ws-a")
    shutil.copytree(ws.root, scratch.root, dirs_exist_ok=True)
    result = sc.push(scratch, target)
    assert result.uploaded == len(sc.local_files(scratch))
    assert _tree(tmp_path / "bucket" / "tarewise") == _local_tree(scratch)

    # A second version appears on the store without its manifest (a copy that died part-way) ...
    live = versions.live_version(scratch)
    partial = "v20261102-9"
    for rel in list(sc.local_files(scratch)):
        if rel.startswith(f"versions/{live}/") and not rel.endswith("manifest.json"):
            dest = tmp_path / "bucket" / "tarewise" / rel.replace(live, partial, 1)
            dest.parent.mkdir(parents=True, exist_ok=True)
            dest.write_bytes((scratch.root / rel).read_bytes())
    # ... a fresh workspace restores the whole one and leaves the partial one out.
    fresh = Workspace.at(tmp_path / "ws-fresh")
    restored = sr.restore(fresh, target)
    assert restored.versions == [live] and restored.live == live
    assert versions.live_version(fresh) == live and not (fresh.versions / partial).exists()
    assert _local_tree(fresh) == _local_tree(scratch)
    assert sc.plan_push(fresh, target).uploads == []       # restored files are journalled as copied
    assert sr.restore(fresh, target).files == 0              # nothing missing any more


def test_bad_shared_settings_are_refused_naming_the_key(tmp_path):
    with pytest.raises(ConfigError, match=r"paths.shared = 'ftp://x/y': unknown scheme 'ftp'"):
        load_config(None, workspace=str(tmp_path / "ws"), shared="ftp://x/y")
    with pytest.raises(ConfigError, match="overlaps paths.workspace"):
        load_config(None, workspace=str(tmp_path / "ws"), shared=str(tmp_path))
    with pytest.raises(sc.SharedCopyRefused, match="overlaps the workspace"):
        sc.SharedCopy.at(str(tmp_path / "ws" / "copy"), Workspace.at(tmp_path / "ws"))
    with pytest.raises(sc.SharedCopyError, match="no live.json yet"):
        sr.read_live_predictions((tmp_path / "empty").as_uri())

    from typer.testing import CliRunner
    from flows.cli import app
    res = CliRunner().invoke(app, ["share", "--workspace", str(tmp_path / "ws")])
    assert res.exit_code == 2 and "paths.shared" in res.output


def test_object_store_uris_resolve_without_a_request():
    """What a user writes in paths.shared for S3 (or an S3-compatible store) and GCS; pyarrow's
    FileSystem.from_uri with an explicit region makes no request."""
    target = sc.SharedCopy.at("s3://reading-app-models/tarewise?region=eu-central-1")
    assert target.fs.type_name == "s3" and target.root == "reading-app-models/tarewise"
    assert target.path("live.json") == "reading-app-models/tarewise/live.json"
    target = sc.SharedCopy.at("gs://reading-app-models/tarewise")
    assert target.fs.type_name == "gcs" and target.root == "reading-app-models/tarewise"


def test_a_backfill_on_a_new_machine_resumes_where_the_shared_copy_ends(first_night, tmp_path):
    from flows.backfill import backfill

    uri = _copy_base(first_night, tmp_path)
    cfg = _cfg(tmp_path, "ws-new", uri)
    out = backfill(cfg=cfg, start=NIGHTS[0], end=NIGHTS[-1])
    # Night 1 is done according to the restored ledger, so only the later nights run here.
    assert [s["run_date"] for s in out["skipped"]] == [NIGHTS[0]]
    assert [n["run_date"] for n in out["nights"]] == NIGHTS[1:]
    ws = Workspace.at(tmp_path / "ws-new")
    assert sr.read_live_predictions(uri)[0] == out["live_version"] == versions.live_version(ws)
    assert _tree(tmp_path / "shared") == _local_tree(ws)


def test_restore_and_share_commands(first_night, tmp_path):
    from typer.testing import CliRunner
    from flows.cli import app

    uri = _copy_base(first_night, tmp_path)
    fresh = tmp_path / "ws-fresh"
    res = CliRunner().invoke(app, ["restore", "--workspace", str(fresh), "--shared", uri])
    assert res.exit_code == 0, res.output
    assert "restored" in res.output
    assert versions.live_version(Workspace.at(fresh)) == sr.read_live_predictions(uri)[0]
    res = CliRunner().invoke(app, ["share", "--dry-run", "--workspace", str(fresh), "--shared", uri])
    assert res.exit_code == 0 and "0 file(s) to copy" in res.output, res.output


@pytest.fixture
def s3_endpoint(monkeypatch):
    """An S3-compatible HTTP server on 127.0.0.1 (``moto.server.ThreadedMotoServer``, the moto package)
    with one empty bucket; yields ``host:port``. pyarrow's S3FileSystem talks real HTTP to it."""
    from moto.server import ThreadedMotoServer

    for key, value in {"AWS_ACCESS_KEY_ID": "tarewise-test", "AWS_SECRET_ACCESS_KEY": "tarewise-test",
                       "AWS_DEFAULT_REGION": "us-east-1"}.items():
        monkeypatch.setenv(key, value)
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    host, port = server.get_host_and_port()
    pafs.S3FileSystem(endpoint_override=f"{host}:{port}", scheme="http", region="us-east-1",
                      allow_bucket_creation=True).create_dir("reading-app-models")
    try:
        yield f"{host}:{port}"
    finally:
        server.stop()


def _s3_tree(target: sc.SharedCopy) -> dict[str, bytes]:
    return {rel: target.read_bytes(rel) for rel in target.listing()}


def test_nights_over_the_s3_protocol(prefect_harness, first_night, tmp_path, s3_endpoint):
    import shutil
    uri = f"s3://reading-app-models/tarewise?endpoint_override={s3_endpoint}&scheme=http&region=us-east-1"
    shutil.copytree(first_night / "ws-a", tmp_path / "ws-a")
    (tmp_path / "ws-a" / sc.JOURNAL).unlink()          # this workspace has not copied anything to S3 yet
    cfg = _cfg(tmp_path, "ws-a", uri, **{"retention.keep_versions": 1})
    for day in NIGHTS[1:]:
        out = _night(cfg, day)
        assert out["status"] == "done" and out["shared"]["files"] > 0
    ws = Workspace.at(tmp_path / "ws-a")
    target = sc.SharedCopy.at(uri, ws)
    assert target.fs.type_name == "s3"
    # The bucket holds exactly the workspace's files, byte for byte; the pruned night-1 version is gone.
    assert _s3_tree(target) == _local_tree(ws)
    assert not any(rel.startswith("versions/v20261101-") for rel in target.listing())
    live, table = sr.read_live_predictions(uri)
    assert live == versions.live_version(ws)
    assert table.equals(pq.read_table(ws.versions / live / "predictions.parquet"))
    # A new machine restores from the bucket alone.
    fresh = Workspace.at(tmp_path / "ws-new")
    assert sr.restore(fresh, target).live == live
    assert _local_tree(fresh) == _local_tree(ws)
