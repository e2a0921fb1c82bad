"""The demo tells its story (tasks/operate/demo_story.py, `tarewise demo`): over the committed invented
nights candidates are held with their reasons (the trial night for want of probe ratings, the campaign's
nights for their critical skew alert), a bad batch goes to the quarantine and alerts fire, and the
closing summary names each with the file that shows it. A second run says the nights are done; `run`
prints where its version and report are; with gate.require_approval a night waits for `approve`. Real
Prefect flows (the session's test API), real files."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from typer.testing import CliRunner

from conftest import REPO
from tasks.operate import demo_story
from tasks.publish.versions import list_versions
from tasks.workspace import Workspace


def _cli(*args: str):
    from flows.cli import app
    return CliRunner().invoke(app, list(args))


@pytest.fixture(scope="module")
def demo_run(prefect_harness, tmp_path_factory):
    """``tarewise demo --dir <tmp>`` once, over every night of the committed sample."""
    root = tmp_path_factory.mktemp("demo")
    result = _cli("demo", "--dir", str(root))
    assert result.exit_code == 0, result.output[-3000:]
    return root, Workspace.at(root / "workspace"), result.output


def test_summary_names_the_held_candidate_the_quarantined_batch_and_the_alerts(demo_run) -> None:
    root, ws, out = demo_run
    held = [m for m in list_versions(ws) if m["state"] == "held"]
    dates = [m["run_date"] for m in held]
    assert dates[0] == demo_story.TRIAL_DATE and set(demo_story.CAMPAIGN) <= set(dates), dates
    reasons = {}
    for m in held:
        manifest = ws.versions / m["version_id"] / "manifest.json"
        reasons[m["run_date"]] = json.loads(manifest.read_text())["gate"]["reason"]
        assert f"version {m['version_id']} held: {reasons[m['run_date']]}" in out and str(manifest) in out
    trial = reasons[demo_story.TRIAL_DATE]
    assert "held-out probe ratings" in trial and "gate.min_heldout" in trial
    # The campaign's nights are held: for their critical alert (configs/demo.toml) where the held-out
    # probe ratings alone would promote them, else on those ratings, with the alert named.
    for night in demo_story.CAMPAIGN:
        r = reasons[night]
        assert (r.startswith("tonight's critical skew_shift alert holds it (gate.hold_on_alert = \"critical\")")
                and "on the held-out probe ratings alone it would be promoted" in r) or r.startswith("held-out MAE "), r
    # Any other held night was held on its held-out probe evidence alone (live's tolerance or the anchor's
    # budget), never for a reason the story does not tell; the last night's candidate goes live.
    for night in set(dates) - {demo_story.TRIAL_DATE, *demo_story.CAMPAIGN}:
        assert reasons[night].startswith("held-out MAE ") and ("gate.tolerance_mae" in reasons[night]
                                                               or "gate.anchor_budget" in reasons[night]), reasons[night]
    assert list_versions(ws)[-1]["state"] == "live"

    quarantine = ws.quarantine / f"dt={demo_story.BAD_BATCH_DATE}" / "part-0.parquet"
    rejected = pq.read_table(quarantine).to_pandas()
    assert len(rejected) == demo_story.BAD_BATCH_ROWS
    assert set(rejected["input_file"].map(lambda f: Path(f).name)) == {demo_story.BAD_BATCH_FILE}
    assert rejected["reason"].str.startswith("rating outside the scale").all()
    assert f"{demo_story.BAD_BATCH_ROWS} rows quarantined from {demo_story.BAD_BATCH_FILE}" in out
    assert str(quarantine) in out

    history = [json.loads(line) for line in ws.alerts.read_text().splitlines()]
    raised = {(r["run_date"], r["kind"]) for r in history}
    assert (demo_story.BAD_BATCH_DATE, "quarantine_share_high") in raised
    assert (demo_story.CAMPAIGN[0], "skew_shift") in raised           # the campaign's first night
    assert (demo_story.TRIAL_DATE, "probe_coverage_low") in raised
    for night, kind in ((demo_story.BAD_BATCH_DATE, "quarantine_share_high"), (demo_story.CAMPAIGN[0], "skew_shift")):
        assert f"alert {kind}" in out and str(ws.reports / f"{night}.html") in out
        assert (ws.reports / f"{night}.html").exists()


def test_demo_ends_with_the_last_report_and_commands_to_paste(demo_run) -> None:
    root, ws, out = demo_run
    last = ws.reports / "2026-11-12.html"
    assert last.exists() and f"last night's report: {last}" in out
    tail = out[out.index("next, ready to paste:"):]
    for command in ("status", "versions", f"report --date {demo_story.CAMPAIGN[0]}", "backfill --start 2026-11-01"):
        assert f" {command}" in tail and f"--workspace {ws.root}" in tail, command
    assert "-m flows.cli" in tail or "tarewise" in tail


def test_a_second_run_says_the_nights_are_done_and_publishes_nothing(demo_run) -> None:
    root, ws, _ = demo_run
    before = sorted(p.name for p in ws.versions.iterdir())
    again = _cli("demo", "--dir", str(root))
    assert again.exit_code == 0, again.output[-2000:]
    assert "13 of 13 demo night(s) already done" in again.output and "nothing to run" in again.output
    assert sorted(p.name for p in ws.versions.iterdir()) == before      # no "-2" versions


def test_run_prints_the_version_folder_and_the_report(demo_run, tmp_path) -> None:
    root, ws, _ = demo_run
    copy = tmp_path / "ws"
    shutil.copytree(ws.root, copy)
    # the night is done with the same inputs, so only --force re-runs it (a plain trigger says "unchanged")
    result = _cli("run", "--date", "2026-11-12", "--force", "-c", str(REPO / "configs" / "demo.toml"), "--logs",
                  str(REPO / "sample_parquet"), "--workspace", str(copy))
    assert result.exit_code == 0, result.output[-2000:]
    assert f"version: {copy / 'versions' / 'v20261112-2'}" in result.output
    assert f"report:  {copy / 'reports' / '2026-11-12.html'}" in result.output
    assert (copy / "versions" / "v20261112-2" / "manifest.json").exists()


def test_the_committed_sample_is_what_the_documented_command_writes(tmp_path) -> None:
    """sample_parquet/README.md: ``python -m tasks.operate.demo_story --out sample_parquet``."""
    assert demo_story.main(["--out", str(tmp_path)]) == 0
    sample = REPO / "sample_parquet"
    made = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*.parquet"))
    assert made == sorted(p.relative_to(sample) for p in sample.rglob("*.parquet"))
    for rel in made:
        pd.testing.assert_frame_equal(pq.read_table(tmp_path / rel).to_pandas(), pq.read_table(sample / rel).to_pandas())
    assert json.loads((tmp_path / "_truth" / "params.json").read_text())["story"] == \
        json.loads((sample / "_truth" / "params.json").read_text())["story"]
    assert sum(f.stat().st_size for f in sample.rglob("*") if f.is_file()) < 1_000_000


def test_by_default_the_demo_uses_the_workspace_demo_toml_names(prefect_harness, tmp_path, monkeypatch) -> None:
    """Run from a fresh folder with no --dir: the workspace is configs/demo.toml's paths.workspace,
    relative to that folder, and git ignores the demo's folder."""
    import tomllib
    named = tomllib.loads((REPO / "configs" / "demo.toml").read_text())["paths"]["workspace"]
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("TAREWISE_WORKSPACE", str(tmp_path / "a-real-workspace"))   # the demo ignores it
    result = _cli("demo", "--nights", "1")
    assert result.exit_code == 0, result.output[-2000:]
    assert (tmp_path / named / "ledger" / "runs.parquet").exists()
    assert not (tmp_path / "a-real-workspace").exists()
    assert f"{Path(named).parts[0]}/" in (REPO / ".gitignore").read_text().splitlines()


def test_with_require_approval_a_night_waits_until_approved(demo_run, tmp_path) -> None:
    """gate.require_approval end to end: the nightly flow holds the passing candidate awaiting approval,
    status lists it, `approve` makes it live."""
    root, ws, _ = demo_run
    copy = tmp_path / "ws"
    shutil.copytree(ws.root, copy)
    config = tmp_path / "approval.toml"
    text = (REPO / "configs" / "demo.toml").read_text(encoding="utf-8")
    config.write_text(text.replace('hold_on_alert = "critical"', 'hold_on_alert = "critical"\nrequire_approval = true'),
                      encoding="utf-8")
    result = _cli("run", "--date", "2026-11-12", "-c", str(config), "--logs", str(REPO / "sample_parquet"),
                  "--workspace", str(copy))
    assert result.exit_code == 0, result.output[-2000:]
    gate = json.loads((copy / "versions" / "v20261112-2" / "manifest.json").read_text())["gate"]
    assert gate["awaiting_approval"] is True and gate["reason"].startswith("awaiting approval (gate.require_approval): ")
    assert "to approve: tarewise approve v20261112-2" in " ".join(result.output.split())
    assert json.loads((copy / "live.json").read_text())["version_id"] == "v20261112-1"
    status = _cli("status", "-c", str(config), "--workspace", str(copy))
    assert "awaiting approval: v20261112-2 (night 2026-11-12" in " ".join(status.output.split())
    approved = _cli("approve", "v20261112-2", "--by", "ana", "-c", str(config), "--workspace", str(copy))
    assert approved.exit_code == 0, approved.output
    assert json.loads((copy / "live.json").read_text())["version_id"] == "v20261112-2"


def test_at_the_end_the_live_version_beats_the_plain_shadow_on_the_demo_ground_truth(demo_run) -> None:
    """Checked against the demo generator's own truth (``sample_parquet/_truth``, invented): true ratings of
    uniformly drawn member x title cells, the missing-at-random error the probe stands in for."""
    import numpy as np

    from tasks.operate.demo_world import GroundTruth
    from tasks.publish.versions import live_version, load_checkpoint

    root, ws, _ = demo_run
    truth = GroundTruth.load(REPO / "sample_parquet")
    rng = np.random.default_rng(0)
    m, t = rng.integers(0, truth.n_members, 20_000), rng.integers(0, truth.n_titles, 20_000)
    users = np.array([f"member-{x:06d}" for x in m], dtype=object)
    items = np.array([f"title-{x:06d}" for x in t], dtype=object)
    y = truth.true_rating_idx(m, t)
    live = live_version(ws)
    model, shadow = load_checkpoint(ws, live, "model"), load_checkpoint(ws, live, "shadow")
    (p_model, f_model), (p_shadow, f_shadow) = model.score(users, items), shadow.score(users, items)
    known = (f_model == "") & (f_shadow == "")
    assert known.sum() > 10_000
    mae_model, mae_shadow = np.abs(p_model - y)[known].mean(), np.abs(p_shadow - y)[known].mean()
    assert mae_model < mae_shadow - 0.03, (mae_model, mae_shadow)
