"""Operations: rollback switches the live pointer and scoring follows; retention never removes the live
(or pinned) version and ages quarantine and metrics out by days; status shows runs, live version and
the week's alerts; the nightly cron schedule is registered as configured (read back through Prefect's
own client from the session's test API)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from fast_config import FAST_TOML
from typer.testing import CliRunner

from tasks import ledger
from tasks.config import ConfigError, load_config
from tasks.publish import versions
from tasks.workspace import Workspace

DATES = ["2026-11-01", "2026-11-02", "2026-11-03"]


@pytest.fixture(scope="module")
def three_versions(prefect_harness, tmp_path_factory):
    """A workspace after a ``--live each`` backfill of three invented demo days."""
    from flows.backfill import backfill
    from tasks.operate.demo_data import generate

    root = tmp_path_factory.mktemp("ops")
    generate(root / "logs", start_date=DATES[0], days=3, n_members=300, n_titles=200, organic_per_day=500,
             seed=8, probe_share=0.1)
    (root / "fast.toml").write_text(FAST_TOML)
    cfg = load_config(root / "fast.toml", logs=str(root / "logs"), workspace=str(root / "ws"))
    out = backfill(cfg=cfg, start=DATES[0], end=DATES[-1], live="each")
    assert [n["state"] for n in out["nights"]] == ["live"] * 3
    return root


@pytest.fixture
def ops(three_versions, tmp_path):
    """A private copy of the three-version workspace and its CLI arguments."""
    shutil.copytree(three_versions / "ws", tmp_path / "ws")
    ws = Workspace.at(tmp_path / "ws")
    args = ["--config", str(three_versions / "fast.toml"), "--workspace", str(ws.root)]
    return ws, args


def _cli(*args):
    from flows.cli import app
    return CliRunner().invoke(app, list(args))


def test_rollback_switches_live_and_score_follows(ops, tmp_path):
    from tasks.publish.scoring_io import score_pairs

    ws, args = ops
    ids = [m["version_id"] for m in versions.list_versions(ws)]
    assert versions.live_version(ws) == ids[-1]
    result = _cli("rollback", "--to", ids[0], "--reason", "bad night", *args)
    assert result.exit_code == 0, result.output
    assert f"{ids[-1]} -> {ids[0]}" in result.output
    assert versions.live_version(ws) == ids[0]
    assert versions.read_pointer(ws)["history"][-1]["reason"] == "rollback: bad night"
    row = ledger.read_ledger(ws).iloc[-1]
    assert (row["kind"], row["status"], row["version_id"], row["state"]) == ("rollback", "done", ids[0], "live")
    assert ids[-1] in row["message"] and "bad night" in row["message"]
    # The version states follow the pointer.
    states = {m["version_id"]: m["state"] for m in versions.list_versions(ws)}
    assert states == {ids[0]: "live", ids[1]: "retired", ids[2]: "retired"}

    # ``score`` (default: live) now uses the rolled-back version: same scores as asking for it by id,
    # different from the version that was live before.
    window = pq.read_table(ws.store).to_pandas().head(200)
    pairs = tmp_path / "pairs.parquet"
    window[["user_id", "item_id"]].to_parquet(pairs)
    cfg = load_config(None, workspace=str(ws.root))
    n, used, _ = score_pairs(cfg, pairs, tmp_path / "live.parquet")
    score_pairs(cfg, pairs, tmp_path / "old.parquet", version=ids[0])
    score_pairs(cfg, pairs, tmp_path / "new.parquet", version=ids[-1])
    live, old, new = (pd.read_parquet(tmp_path / f"{k}.parquet")["score"].to_numpy() for k in ("live", "old", "new"))
    assert (n, used) == (200, ids[0])
    np.testing.assert_array_equal(live, old)
    assert not np.array_equal(live, new)

    # The next night warm-starts from the rolled-back version.
    assert versions.base_for_date(ws, "2026-11-04") == ids[0]


def test_rollback_to_unknown_version_is_refused_and_changes_nothing(ops):
    ws, args = ops
    before = ws.live_pointer.read_bytes(), len(ledger.read_ledger(ws))
    result = _cli("rollback", "--to", "v20260101-9", *args)
    assert result.exit_code == 1
    assert "no version 'v20260101-9'" in result.output and "v20261103-1" in result.output
    assert (ws.live_pointer.read_bytes(), len(ledger.read_ledger(ws))) == before


def test_retention_never_removes_live_or_pinned_versions(ops):
    from tasks.config import RetentionConfig
    from tasks.operate.retention import apply_retention

    ws, args = ops
    ids = [m["version_id"] for m in versions.list_versions(ws)]
    _cli("rollback", "--to", ids[0], *args)          # live is now the oldest version
    keep_one = RetentionConfig(keep_versions=1, pinned=(ids[1],))
    assert apply_retention(ws, keep_one, "2026-11-03").versions == []   # newest + live + pinned: all kept
    # Unpinned, ids[1] is still kept: the newest night (ids[2]) was judged against it as the gate's
    # anchor, and the next night needs it (versions.prune); a version neither live, pinned, newest, the
    # live version's base nor that anchor goes (test_retention_keeps_the_live_versions_base).
    assert versions.read_manifest(ws, ids[2])["metrics"]["anchor"]["version_id"] == ids[1]
    result = apply_retention(ws, RetentionConfig(keep_versions=1), "2026-11-03")
    assert result.versions == []
    assert sorted(p.name for p in ws.versions.iterdir()) == ids
    assert versions.live_version(ws) == ids[0] and versions.load_checkpoint(ws, ids[0]) is not None


def test_retention_keeps_the_live_versions_base(ops):
    """The live version's base is what a re-run of the live date warm-starts from: it stays."""
    from tasks.config import RetentionConfig
    from tasks.operate.retention import apply_retention

    ws, _ = ops
    ids = [m["version_id"] for m in versions.list_versions(ws)]
    assert versions.live_version(ws) == ids[2] and versions.read_manifest(ws, ids[2])["base_version"] == ids[1]
    assert apply_retention(ws, RetentionConfig(keep_versions=1), "2026-11-03").versions == [ids[0]]
    assert versions.base_for_date(ws, "2026-11-03") == ids[1]
    assert not list(ws.versions.glob(".trash-*"))


def test_retention_ages_out_quarantine_and_metrics_by_days(ops):
    from tasks.config import RetentionConfig
    from tasks.monitor.metrics_store import read_metrics
    from tasks.operate.retention import apply_retention

    ws, args = ops
    assert sorted(p.name for p in ws.quarantine.iterdir()) == [f"dt={d}" for d in DATES]
    assert read_metrics(ws)["run_date"].tolist() == DATES
    cfg = RetentionConfig(keep_versions=10, quarantine_days=1, metrics_days=2)
    result = apply_retention(ws, cfg, as_of="2026-11-03")
    assert result.quarantine_dates == ["2026-11-01"] and result.metrics_rows == 0
    assert sorted(p.name for p in ws.quarantine.iterdir()) == [f"dt={d}" for d in DATES[1:]]
    assert read_metrics(ws)["run_date"].tolist() == DATES
    # ``tarewise prune`` counts days from the newest completed run date (2026-11-03), not the clock.
    (ws.root / "ret.toml").write_text("[retention]\nmetrics_days = 1\nquarantine_days = 1\n")
    out = _cli("prune", "--config", str(ws.root / "ret.toml"), "--workspace", str(ws.root))
    assert out.exit_code == 0, out.output
    assert "retention as of 2026-11-03" in out.output and "1 metric row(s)" in out.output
    assert read_metrics(ws)["run_date"].tolist() == DATES[1:]
    assert len(versions.list_versions(ws)) == 3


def test_status_shows_live_runs_and_the_weeks_alerts(ops):
    from tasks.monitor.alert_history import append_history

    ws, args = ops
    live = versions.live_version(ws)
    for run_date, kind in (("2026-10-20", "probe_coverage_low"), ("2026-11-02", "skew_shift")):
        append_history(ws, {"alert_id": f"a-{run_date}", "run_date": run_date, "kind": kind, "severity": "warning",
                            "status": "new", "explanation": f"invented alert for {run_date}", "phase": "final"})
    result = _cli("status", *args)
    assert result.exit_code == 0, result.output
    assert f"live: {live}" in result.output and "lock: free" in result.output
    assert result.output.count("backfill") >= 3 and "2026-11-03" in result.output
    assert "skew_shift" in result.output and "invented alert for 2026-11-02" in result.output
    assert "2026-10-20" not in result.output  # older than a week before the newest night


def test_nightly_schedule_registered_as_configured(prefect_harness, three_versions):
    """Read back through Prefect's own client: cron, time zone, concurrency limit, parameters."""
    from prefect import get_client
    from prefect.client.schemas.objects import ConcurrencyLimitStrategy

    from flows.deployments import build_deployments

    cfg = load_config(three_versions / "fast.toml", logs=str(three_versions / "logs"),
                      workspace=str(three_versions / "ws")).updated(
        {"runtime.schedule": "15 3 * * 1-5", "runtime.timezone": "America/Chicago"})
    night, fill = build_deployments(cfg)
    with get_client(sync_client=True) as client:
        dn = client.read_deployment(night.apply())
        db = client.read_deployment(fill.apply())
    assert len(dn.schedules) == 1
    sched = dn.schedules[0].schedule
    assert (sched.cron, sched.timezone) == ("15 3 * * 1-5", "America/Chicago")
    assert dn.schedules[0].active
    assert dn.global_concurrency_limit.limit == 1 and db.global_concurrency_limit.limit == 1
    assert dn.concurrency_options.collision_strategy == ConcurrencyLimitStrategy.ENQUEUE
    assert db.schedules == []
    assert dn.entrypoint == "flows.deployments.scheduled_nightly"
    settings = dn.parameters["settings"]
    assert settings["paths"]["workspace"] == str((three_versions / "ws").resolve())
    assert settings["runtime"]["flow_timeout_seconds"] == cfg.runtime.flow_timeout_seconds
    from tasks.config import parse_config
    assert parse_config(settings).digest() == cfg.digest()  # every setting travels with the deployment


def test_bad_schedule_and_bad_settings_are_refused_naming_the_key(prefect_harness, three_versions):
    from flows.deployments import build_deployments, scheduled_nightly

    cfg = load_config(three_versions / "fast.toml", workspace=str(three_versions / "ws"))
    with pytest.raises(ConfigError, match="runtime.schedule"):
        build_deployments(cfg.updated({"runtime.schedule": "61 * * *"}))
    with pytest.raises(ConfigError, match="runtime.timezone"):
        build_deployments(cfg.updated({"runtime.timezone": "Mars/Olympus"}))
    with pytest.raises(ConfigError, match=r"model\.dim"):
        scheduled_nightly(settings={"model": {"dim": 0}}, run_date="2026-11-01")


def test_night_for_a_scheduled_run_is_the_previous_local_day():
    from datetime import datetime, timezone

    from flows.deployments import night_for

    # 23:30 UTC on the 28th is already 00:30 on the 29th in Berlin: that run processes the 28th.
    assert night_for(datetime(2026, 3, 29, 0, 30, tzinfo=timezone.utc), "Europe/Berlin") == "2026-03-28"
    assert night_for(datetime(2026, 3, 28, 23, 30, tzinfo=timezone.utc), "Europe/Berlin") == "2026-03-28"
    assert night_for(datetime(2026, 3, 28, 23, 30, tzinfo=timezone.utc), "UTC") == "2026-03-27"


def test_serve_without_a_server_explains_what_to_do(three_versions):
    from conftest import REPO

    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}
    out = subprocess.run([sys.executable, "-m", "flows.cli", "serve", "--config", str(three_versions / "fast.toml"),
                          "--workspace", str(three_versions / "ws-serve")], cwd=REPO, env=env,
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 2, out.stderr[-2000:]
    assert "schedules do not fire" in out.stderr and "prefect server start" in out.stderr


def test_scheduled_night_processes_the_day_before_its_scheduled_start(prefect_harness, ops, three_versions):
    """Without run_date the deployment's flow derives the night from the run's scheduled start in
    runtime.timezone; the invented logs end on 2026-11-03, so that night's partition is missing and
    the error names the date it chose."""
    from datetime import datetime, timezone

    from flows.deployments import deployment_settings, night_for, scheduled_nightly

    ws, _ = ops
    # catch_up 'none': only the scheduled night runs (the month of nights owed since the sample's last day
    # would each fail the same way first; catching up is tests/flows/test_unattended.py's subject).
    cfg = load_config(three_versions / "fast.toml", logs=str(three_versions / "logs"),
                      workspace=str(ws.root)).updated({"runtime.catch_up": "none"})
    before = night_for(datetime.now(timezone.utc), cfg.runtime.timezone)
    with pytest.raises(Exception, match="partition not found") as info:
        scheduled_nightly(settings=deployment_settings(cfg))
    after = night_for(datetime.now(timezone.utc), cfg.runtime.timezone)
    assert f"run date {before}" in str(info.value) or f"run date {after}" in str(info.value)
    assert ledger.read_ledger(ws).iloc[-1][["kind", "status"]].tolist() == ["nightly", "failed"]


def test_serve_work_pool_registers_both_deployments_on_the_pool(prefect_harness, three_versions):
    from prefect import get_client
    from prefect.client.schemas.actions import WorkPoolCreate

    with get_client(sync_client=True) as client:
        client.create_work_pool(WorkPoolCreate(name="tarewise-test-pool", type="process"))
    out = _cli("serve", "--work-pool", "tarewise-test-pool", "--config", str(three_versions / "fast.toml"),
               "--logs", str(three_versions / "logs"), "--workspace", str(three_versions / "ws"))
    assert out.exit_code == 0, out.output
    assert "prefect worker start --pool tarewise-test-pool" in out.output
    with get_client(sync_client=True) as client:
        for name in ("tarewise-scheduled-nightly/nightly", "tarewise-scheduled-backfill/backfill"):
            dep = client.read_deployment_by_name(name)
            assert dep.work_pool_name == "tarewise-test-pool", name
        night = client.read_deployment_by_name("tarewise-scheduled-nightly/nightly")
    assert (night.schedules[0].schedule.cron, night.schedules[0].schedule.timezone) == ("30 2 * * *", "Europe/Berlin")
