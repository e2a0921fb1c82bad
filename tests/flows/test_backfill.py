"""Backfill: ten invented demo days replayed in one process; a real SIGKILL in the middle and a resume
that ends where an uninterrupted backfill ends; idempotent re-runs; a failed date stops the range; the
lock refuses a second run; thin dates are skipped; a sweep compares settings in scratch workspaces.

Real Parquet logs (tasks/demo_data.generate, small), real torch training, real Prefect flows on the
session's test API. The demo numbers are invented (a fictional library network's reading app)."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from tasks import ledger
from tasks.config import load_config
from tasks.operate.backfill_plan import chain_head, plan_backfill
from tasks.publish import versions
from tasks.workspace import Workspace

START, END = "2026-11-01", "2026-11-10"
DATES = [f"2026-11-{d:02d}" for d in range(1, 11)]

# Small and fast on purpose: the properties under test (ordering, chaining, resume, identity) do not
# depend on model quality. The gate is lenient so the last night reliably goes live; retention keeps
# every version so nights can be compared one by one (retention has its own tests).
FAST_TOML = """
[model]
dim = 4
max_epochs = 6
finetune_epochs = 2

[evaluate]
bootstrap = 20

[gate]
tolerance_mae = 0.5
anchor_budget = 0.5
max_segment_regression = 1.0

[retention]
keep_versions = 30

[runtime]
shadow = false
timezone = "Europe/Berlin"
"""


@pytest.fixture(scope="module")
def history(tmp_path_factory):
    """Ten days of invented logs and the fast config file."""
    from tasks.operate.demo_data import generate

    root = tmp_path_factory.mktemp("backfill-history")
    generate(root / "logs", start_date=START, days=10, n_members=400, n_titles=300, organic_per_day=600,
             seed=5, probe_share=0.1)
    (root / "fast.toml").write_text(FAST_TOML)
    return root


def _cfg(history: Path, ws: Path, logs: Path | None = None, **overrides):
    cfg = load_config(history / "fast.toml", logs=str(logs or history / "logs"), workspace=str(ws))
    return cfg.updated(overrides) if overrides else cfg


def _cli_args(history: Path, ws: Path, *args: str) -> list[str]:
    return [*args, "--config", str(history / "fast.toml"), "--logs", str(history / "logs"), "--workspace", str(ws)]


def _preds(ws: Workspace, vid: str) -> pd.DataFrame:
    return pq.read_table(ws.versions / vid / "predictions.parquet").to_pandas()


def _done_versions(ws: Workspace) -> dict[str, str]:
    latest = ledger.latest_by_date(ws)
    return {d: r["version_id"] for d, r in latest.iterrows() if r["status"] == "done"}


@pytest.fixture(scope="module")
def uninterrupted(prefect_harness, history):
    """One uninterrupted ``--live last`` backfill of the ten days (in-process)."""
    from flows.backfill import backfill

    ws_path = history / "ws-uninterrupted"
    t0 = time.perf_counter()
    out = backfill(cfg=_cfg(history, ws_path), start=START, end=END, live="last")
    return Workspace.at(ws_path), out, time.perf_counter() - t0


def test_backfill_ten_days_carries_model_forward_and_publishes_last_live(uninterrupted):
    ws, out, seconds = uninterrupted
    assert [n["run_date"] for n in out["nights"]] == DATES and not out["skipped"]
    led = ledger.read_ledger(ws)
    assert list(led["kind"]) == ["backfill"] * 10 and list(led["status"]) == ["done"] * 10
    assert led["rows_ingested"].gt(0).all() and led["durations_json"].str.contains('"train"').all()
    manifests = {m["run_date"]: m for m in versions.list_versions(ws)}
    assert sorted(manifests) == DATES
    # Carried forward: each night warm-starts from the previous night's version, although none of
    # those was ever live (``--live last``).
    assert manifests[DATES[0]]["base_version"] is None
    for prev, d in zip(DATES, DATES[1:]):
        assert manifests[d]["base_version"] == manifests[prev]["version_id"], d
    assert all(manifests[d]["state"] in ("candidate", "held") for d in DATES[:-1])
    assert manifests[DATES[-1]]["state"] == "live" and out["live_version"] == manifests[DATES[-1]]["version_id"]
    assert versions.read_pointer(ws)["history"][-1]["version_id"] == out["live_version"]
    assert not ws.lock.exists()
    print(f"10-night backfill in-process: {seconds:.1f}s")


def test_sigkill_mid_backfill_then_resume_ends_like_uninterrupted(prefect_harness, history, uninterrupted):
    """Killed for real inside the fifth night (after its version was renamed into place, before the
    ledger said done); resumed through the CLI; every night's predictions and the live version match
    the uninterrupted backfill."""
    from conftest import REPO
    from flows.cli import app

    ref_ws, ref_out, _ = uninterrupted
    ws = Workspace.at(history / "ws-killed")
    env = dict(os.environ, PREFECT_API_URL=prefect_harness, TAREWISE_FAILPOINT="publish:renamed@5")
    args = _cli_args(history, ws.root, "backfill", "--start", START, "--end", END)
    killed = subprocess.run([sys.executable, "-m", "flows.cli", *args], cwd=REPO, env=env, capture_output=True,
                            text=True, timeout=600)
    assert killed.returncode == -signal.SIGKILL, (killed.returncode, killed.stderr[-3000:])
    assert ws.lock.exists()  # the dead process's lock is left behind, as after a real crash
    latest = ledger.latest_by_date(ws)
    assert list(latest["status"]) == ["done"] * 4 + ["running"]
    assert (ws.versions / "v20261105-1").exists()  # published but never recorded as done

    plan = {p.run_date: p for p in plan_backfill(ws, _cfg(history, ws.root), START, END)}
    assert [plan[d].action for d in DATES] == ["skip"] * 4 + ["run"] * 6
    assert plan["2026-11-05"].reason.startswith("interrupted before")

    result = CliRunner().invoke(app, args)
    assert result.exit_code == 0, result.output
    assert "2026-11-10" in result.output and "live version: v20261110-1" in result.output

    # Same ledger status per date, and the killed night's row is marked interrupted, not left running.
    led = ledger.read_ledger(ws)
    assert (ledger.latest_by_date(ws)["status"] == ledger.latest_by_date(ref_ws)["status"]).all()
    assert led.loc[led["run_date"] == "2026-11-05", "status"].tolist() == ["interrupted", "done"]
    # Same predictions night by night (the resumed fifth night publishes v20261105-2, same content).
    mine, ref = _done_versions(ws), _done_versions(ref_ws)
    assert mine["2026-11-05"] == "v20261105-2"
    for d in DATES:
        pd.testing.assert_frame_equal(_preds(ws, mine[d]), _preds(ref_ws, ref[d]), obj=d)
    live = versions.live_version(ws)
    assert versions.read_manifest(ws, live)["run_date"] == END
    pd.testing.assert_frame_equal(_preds(ws, live), _preds(ref_ws, ref_out["live_version"]))
    assert not ws.lock.exists()


def test_rerun_skips_done_dates_and_force_reproduces_predictions(prefect_harness, history, uninterrupted, tmp_path):
    from flows.backfill import backfill

    ref_ws, ref_out, _ = uninterrupted
    shutil.copytree(ref_ws.root, tmp_path / "ws")
    ws = Workspace.at(tmp_path / "ws")
    cfg = _cfg(history, ws.root)
    rows_before = len(ledger.read_ledger(ws))

    again = backfill(cfg=cfg, start=START, end=END, live="last")
    assert again["nights"] == [] and len(again["skipped"]) == 10
    assert len(ledger.read_ledger(ws)) == rows_before and versions.live_version(ws) == ref_out["live_version"]

    forced = backfill(cfg=cfg, start="2026-11-09", end=END, live="last", force=True)
    assert [n["version_id"] for n in forced["nights"]] == ["v20261109-2", "v20261110-2"]
    for d in ("2026-11-09", END):
        vid = "v" + d.replace("-", "")
        pd.testing.assert_frame_equal(_preds(ws, vid + "-2"), _preds(ws, vid + "-1"), obj=d)
    # The re-run's first night starts where the original did (the 8th night's version).
    assert versions.read_manifest(ws, "v20261109-2")["base_version"] == "v20261108-1"
    assert versions.live_version(ws) == "v20261110-2"


def test_failed_date_stops_backfill_naming_date_and_cause(prefect_harness, history, tmp_path):
    from flows.backfill import BackfillStopped, backfill

    logs = tmp_path / "logs"
    for d in DATES[:3]:
        shutil.copytree(history / "logs" / f"dt={d}", logs / f"dt={d}")
    bad = logs / "dt=2026-11-02" / "part-0.parquet"
    bad.write_bytes(bad.read_bytes()[:300])  # truncated Parquet
    ws = Workspace.at(tmp_path / "ws")
    with pytest.raises(BackfillStopped) as info:
        backfill(cfg=_cfg(history, ws.root, logs=logs), start=DATES[0], end=DATES[2], live="each")
    msg = str(info.value)
    assert "stopped at 2026-11-02" in msg and "part-0.parquet" in msg and "resume from 2026-11-02" in msg
    latest = ledger.latest_by_date(ws)
    assert latest["status"].to_dict() == {DATES[0]: "done", DATES[1]: "failed"}  # the third never started
    assert versions.live_version(ws) == latest.loc[DATES[0], "version_id"]
    assert not ws.lock.exists()


def test_second_run_refused_while_another_process_holds_the_lock(prefect_harness, history, tmp_path):
    from conftest import REPO
    from flows.cli import app

    ws = Workspace.at(tmp_path / "ws")
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys, time; from pathlib import Path; from tasks.lock import workspace_lock\n"
         "with workspace_lock(Path(sys.argv[1]), 'a nightly run for 2026-11-01', 3600):\n"
         "    print('held', flush=True); time.sleep(60)", str(ws.lock)],
        cwd=REPO, stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        result = CliRunner().invoke(app, _cli_args(history, ws.root, "backfill", "--start", DATES[0],
                                                   "--end", DATES[1]))
        # The flow itself (what a deployment run calls) is refused by the lock, not only the CLI.
        from flows.backfill import backfill
        from tasks.lock import LockHeld
        with pytest.raises(LockHeld, match="locked by a nightly run for 2026-11-01"):
            backfill(cfg=_cfg(history, ws.root, **{"runtime.lock_wait_seconds": 0}), start=DATES[0], end=DATES[1])
    finally:
        holder.kill()
        holder.wait()
    assert result.exit_code == 1
    assert "backfill refused" in result.output and "locked by a nightly run for 2026-11-01" in result.output
    assert f"pid {holder.pid}" in result.output
    # The CLI refused before any flow ran; the flow's refusal (lock_wait_seconds = 0 here) is one ledger row.
    assert ledger.read_ledger(ws)["status"].tolist() == ["refused"] and versions.live_version(ws) is None


def test_thin_date_is_skipped_and_next_night_starts_cold(prefect_harness, history, tmp_path):
    """runtime.min_ratings_to_train above one day's volume but below two days': the first night is
    recorded as skipped (nothing trained), the second trains on the two-day window."""
    from flows.backfill import backfill

    ws = Workspace.at(tmp_path / "ws")
    one_day = pq.read_table(history / "logs" / f"dt={DATES[0]}").num_rows
    cfg = _cfg(history, ws.root, **{"runtime.min_ratings_to_train": one_day + 50})
    out = backfill(cfg=cfg, start=DATES[0], end=DATES[1], live="last")
    assert [n["status"] for n in out["nights"]] == ["skipped", "done"]
    latest = ledger.latest_by_date(ws)
    assert latest["status"].tolist() == ["skipped", "done"]
    assert "runtime.min_ratings_to_train" in latest.loc[DATES[0], "message"]
    assert chain_head(ws, DATES[0], DATES[1]) is None
    m = versions.read_manifest(ws, latest.loc[DATES[1], "version_id"])
    assert m["base_version"] is None and m["data_window"]["dates_present"] == DATES[:2]
    plan = plan_backfill(ws, cfg, DATES[0], DATES[1])
    assert [p.action for p in plan] == ["skip", "skip"] and plan[0].reason.startswith("skipped (")


def test_sweep_compares_settings_in_scratch_and_leaves_main_untouched(prefect_harness, history, uninterrupted,
                                                                      tmp_path):
    from flows.cli import app

    ref_ws, _, _ = uninterrupted
    shutil.copytree(ref_ws.root, tmp_path / "ws")
    ws = Workspace.at(tmp_path / "ws")
    pointer, ledger_bytes = ws.live_pointer.read_bytes(), ws.ledger.read_bytes()
    listed = sorted(p.name for p in ws.versions.iterdir())

    result = CliRunner().invoke(app, _cli_args(history, ws.root, "backfill", "--start", "2026-11-09", "--end", END,
                                               "--sweep", "debias.method=plain,per_user"))
    assert result.exit_code == 0, result.output
    assert "method=plain" in result.output and "method=per_user" in result.output and "lowest MAE" in result.output

    # The main workspace is exactly as before.
    assert ws.live_pointer.read_bytes() == pointer and ws.ledger.read_bytes() == ledger_bytes
    assert sorted(p.name for p in ws.versions.iterdir()) == listed

    from tasks.operate.sweep import read_results, sweep_root
    root = sweep_root(ws, "2026-11-09", END)
    rows = read_results(root)["settings"]
    assert [r["label"] for r in rows] == ["method=plain", "method=per_user"]
    for k, row in enumerate(rows):
        sws = Workspace.at(root / f"s{k:02d}")
        ms = versions.list_versions(sws)
        assert [m["run_date"] for m in ms] == ["2026-11-09", END] and {m["method"] for m in ms} == {
            row["overrides"]["debias.method"]}
        # The table's MAE is the mean of the nights' recorded held-out candidate MAE.
        assert row["mae"] == pytest.approx(sum(m["metrics"]["candidate"]["mae"] for m in ms) / 2)
        assert row["heldout"] == sum(m["metrics"]["candidate"]["n"] for m in ms)
        # The first night trained on the main store's history (copied), like the main run did.
        assert ms[0]["data_window"]["dates_present"] == DATES[:9]
        assert ms[1]["base_version"] == ms[0]["version_id"]
        assert versions.live_version(sws) is None
    assert rows[0]["mae"] != rows[1]["mae"]


def test_sweep_settings_are_validated_before_anything_runs(history, tmp_path):
    from flows.cli import app

    ws = tmp_path / "ws"
    runner = CliRunner()
    bad = runner.invoke(app, _cli_args(history, ws, "backfill", "--start", DATES[0], "--end", DATES[1],
                                       "--sweep", "debias.calibration_weight=1,-1"))
    assert bad.exit_code == 2 and "calibration_weight=-1" in bad.output and "debias.calibration_weight" in bad.output
    for spec, words in (("paths.logs=/elsewhere", "cannot be swept"), ("debias.heldout_share=0.2,0.4", "cannot be swept"),
                        ("debias.method", "expected KEY=V1,V2"), ("debias.nope=1", "unknown config key")):
        out = runner.invoke(app, _cli_args(history, ws, "backfill", "--start", DATES[0], "--end", DATES[1],
                                           "--sweep", spec))
        assert out.exit_code == 2 and words in out.output, (spec, out.output)
    plan = runner.invoke(app, _cli_args(history, ws, "backfill", "--start", DATES[0], "--end", DATES[1], "--dry-run",
                                        "--sweep", "debias.method=plain,calibrated",
                                        "--sweep", "debias.profile_points=10,20"))
    assert plan.exit_code == 0, plan.output
    assert "4 setting(s) x 2 night(s)" in plan.output
    assert "method=calibrated, profile_points=20" in plan.output
    assert not (ws / "sweeps").exists() and not (ws / "ledger").exists()
