"""Unattended operation: no night lost, every fault named, the ledger and Prefect agree.

Real flows on the session's test API, real Parquet logs (tasks/operate/demo_data.generate, small), real
signals sent to real subprocesses (tasks/failpoints.py). Each case failed before issue 15's changes:
an empty day looked like a normal night, a report failure after publishing recorded the night as failed,
SIGTERM was recorded as a bare exception, a SIGKILLed run's Prefect flow run stayed Running, and missed
nights were neither caught up nor named."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from tasks import ledger
from tasks.config import load_config
from tasks.publish import versions
from tasks.workspace import Workspace

START = "2026-11-01"
DATES = [f"2026-11-{d:02d}" for d in range(1, 7)]


@pytest.fixture(scope="module")
def history(tmp_path_factory):
    """Six days of invented logs and the fast config file."""
    from fast_config import FAST_TOML
    from tasks.operate.demo_data import generate

    root = tmp_path_factory.mktemp("unattended-history")
    generate(root / "logs", start_date=START, days=len(DATES), n_members=300, n_titles=200, organic_per_day=400,
             seed=11, probe_share=0.1)
    (root / "fast.toml").write_text(FAST_TOML)
    return root


def _cfg(history: Path, ws: Path, logs: Path | None = None, **overrides):
    cfg = load_config(history / "fast.toml", logs=str(logs or history / "logs"), workspace=str(ws))
    return cfg.updated(overrides) if overrides else cfg


def _alerts(ws: Workspace, kind: str) -> list[dict]:
    from tasks.monitor.alert_history import read_history
    return [r for r in read_history(ws) if r.get("kind") == kind and r.get("phase") == "final"]


def _prefect_state(flow_run_id: str) -> str:
    from prefect.client.orchestration import get_client
    with get_client(sync_client=True) as client:
        return client.read_flow_run(flow_run_id).state.type.value


def test_empty_day_is_a_skipped_night_with_an_alert(prefect_harness, history, tmp_path):
    from flows.nightly import nightly

    logs = tmp_path / "logs"
    for d in DATES[:2]:
        (logs / f"dt={d}").mkdir(parents=True)
    first = next((history / "logs" / f"dt={DATES[0]}").glob("*.parquet"))
    (logs / f"dt={DATES[0]}" / first.name).write_bytes(first.read_bytes())
    pd.read_parquet(first).iloc[:0].to_parquet(logs / f"dt={DATES[1]}" / "part-0.parquet", index=False)  # 0 rows
    cfg = _cfg(history, tmp_path / "ws", logs)
    ws = Workspace.at(cfg.paths.workspace)
    live = nightly(cfg=cfg, run_date=DATES[0])["version_id"]
    out = nightly(cfg=cfg, run_date=DATES[1])
    assert out["status"] == "skipped" and out["version_id"] is None
    assert out["message"].startswith(f"empty day: run date {DATES[1]}: 0 valid rows")
    assert ledger.latest_by_date(ws).loc[DATES[1], "status"] == "skipped"
    assert versions.live_version(ws) == live and len(versions.list_versions(ws)) == 1
    [alert] = _alerts(ws, "empty_day")
    assert alert["run_date"] == DATES[1] and "0 valid rows" in alert["explanation"]


def test_report_failure_after_publishing_keeps_the_night_done(prefect_harness, history, tmp_path):
    from flows.nightly import nightly
    from tasks.monitor.report import render_report

    cfg = _cfg(history, tmp_path / "ws")
    ws = Workspace.at(cfg.paths.workspace)
    nightly(cfg=cfg, run_date=DATES[0])
    html = ws.reports
    for p in html.iterdir():     # the reports folder becomes a file: writing tonight's report fails
        p.unlink()
    html.rmdir()
    html.write_text("not a folder")
    out = nightly(cfg=cfg, run_date=DATES[1])
    row = ledger.latest_by_date(ws).loc[DATES[1]]
    assert out["status"] == row["status"] == "done" and row["state"] == "live"
    assert versions.live_version(ws) == out["version_id"]
    assert "report warning" in row["message"] and f"tarewise report --date {DATES[1]}" in row["message"]
    html.unlink()                # the operator fixes it and re-renders with the command given
    path, _ = render_report(ws, DATES[1], cfg)
    assert Path(path).exists()


def _cli(args, env_extra, api_url):
    from conftest import REPO
    env = dict(os.environ, PREFECT_API_URL=api_url, **env_extra)
    return subprocess.run([sys.executable, "-m", "flows.cli", *args], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=600)


def test_sigterm_is_recorded_as_a_stop_naming_signal_and_stage(prefect_harness, history, tmp_path):
    from flows.nightly import nightly

    cfg = _cfg(history, tmp_path / "ws")
    ws = Workspace.at(cfg.paths.workspace)
    common = ["--config", str(history / "fast.toml"), "--logs", str(history / "logs"), "--workspace", str(ws.root)]
    nightly(cfg=cfg, run_date=DATES[0])
    stopped = _cli(["run", "--date", DATES[1], *common], {"TAREWISE_FAILPOINT": "publish:staged=SIGTERM"},
                   prefect_harness)
    assert stopped.returncode != 0
    row = ledger.read_ledger(ws).iloc[-1]
    assert row["run_date"] == DATES[1] and row["status"] == "interrupted"
    assert row["message"] == "stopped by SIGTERM during stage publish (last finished step: predict)"
    assert "SystemExit" not in row["message"] and row["flow_run_id"]
    assert _prefect_state(row["flow_run_id"]) in ("CRASHED", "CANCELLED")
    assert versions.live_version(ws) == ledger.latest_by_date(ws).loc[DATES[0], "version_id"]


def test_sigterm_after_publishing_leaves_the_night_done_in_ledger_and_prefect(prefect_harness, history, tmp_path):
    """A stop request that arrives once the night is recorded done (e.g. serve stopped during the report)
    is held back until the run ends: the ledger says done and Prefect says Completed, never Cancelled."""
    ws = Workspace.at(tmp_path / "ws")
    common = ["--config", str(history / "fast.toml"), "--logs", str(history / "logs"), "--workspace", str(ws.root)]
    out = _cli(["run", "--date", DATES[0], *common], {"TAREWISE_FAILPOINT": "night:published=SIGTERM"},
               prefect_harness)
    assert out.returncode == 0, out.stderr[-2000:]
    row = ledger.read_ledger(ws).iloc[-1]
    assert row["status"] == "done" and versions.live_version(ws) == row["version_id"]
    assert _prefect_state(row["flow_run_id"]) == "COMPLETED"
    assert "SIGTERM received after night" in out.stderr + out.stdout


def test_sigkilled_run_is_settled_by_the_next_one_in_ledger_and_prefect(prefect_harness, history, tmp_path):
    from flows.nightly import nightly

    cfg = _cfg(history, tmp_path / "ws")
    ws = Workspace.at(cfg.paths.workspace)
    common = ["--config", str(history / "fast.toml"), "--logs", str(history / "logs"), "--workspace", str(ws.root)]
    killed = _cli(["run", "--date", DATES[0], *common], {"TAREWISE_FAILPOINT": "publish:staged"}, prefect_harness)
    assert killed.returncode == -signal.SIGKILL
    dead = ledger.read_ledger(ws).iloc[-1]
    assert (dead["status"], dead["stage"]) == ("running", "publish")
    assert _prefect_state(dead["flow_run_id"]) == "RUNNING"      # nobody told Prefect
    out = nightly(cfg=cfg, run_date=DATES[0])                     # takes over the stale lock
    assert out["status"] == "done"
    row = ledger.read_ledger(ws).set_index("run_id").loc[dead["run_id"]]
    assert row["status"] == "interrupted" and row["message"].endswith("during stage publish")
    assert _prefect_state(dead["flow_run_id"]) == "CRASHED"


def test_scheduled_run_catches_up_owed_nights_in_order_or_names_them_missed(prefect_harness, history, tmp_path):
    from flows.deployments import deployment_settings, scheduled_nightly
    from flows.nightly import nightly

    cfg = _cfg(history, tmp_path / "ws", **{"runtime.catch_up": "last:1"})
    ws = Workspace.at(cfg.paths.workspace)
    nightly(cfg=cfg, run_date=DATES[0])
    # Serve was down for 2026-11-02 and -03; the run scheduled for -04 runs -03 then -04, names -02 missed.
    out = scheduled_nightly(settings=deployment_settings(cfg), run_date=DATES[3])
    assert out["nights"] == [DATES[2], DATES[3]] and out["missed"] == [DATES[1]]
    rows = ledger.read_ledger(ws)
    assert rows["run_date"].tolist() == [DATES[0], DATES[2], DATES[3]]          # date order
    assert (rows["status"] == "done").all() and rows["flow_run_id"].notna().all()
    [alert] = _alerts(ws, "missed_nights")
    assert DATES[1] in alert["explanation"] and "tarewise backfill" in alert["explanation"]
    # catch_up = all, at most one night a run: the owed night first, the scheduled one waits for the next run.
    cfg2 = cfg.updated({"runtime.catch_up": "all", "runtime.catch_up_per_run": 1})
    out = scheduled_nightly(settings=deployment_settings(cfg2), run_date=DATES[5])
    assert out["nights"] == [DATES[4]] and ledger.latest_by_date(ws).loc[DATES[4], "status"] == "done"


def test_status_check_names_a_paused_deployment(prefect_harness, history, tmp_path, monkeypatch):
    """Stopping serve pauses the deployments (Prefect's runner does on shutdown); status names that."""
    from prefect.client.orchestration import get_client

    from flows.deployments import build_deployments, paused_deployments

    cfg = _cfg(history, tmp_path / "ws")
    ids = [d.apply() for d in build_deployments(cfg)]
    monkeypatch.setenv("PREFECT_API_URL", prefect_harness)
    assert paused_deployments() == []
    with get_client(sync_client=True) as client:
        client.pause_deployment(ids[0])
    [finding] = paused_deployments()
    assert finding.severity == "problem" and "tarewise-scheduled-nightly/nightly is paused" in finding.what
    assert "tarewise serve" in finding.fix
