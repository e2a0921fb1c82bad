"""The probe budget and plan over a real workspace (store partitions, published versions) and through the
real command line: what they read, what they write, and that an opted-out member is never in a plan."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from versions_kit import CFG, publish_night, small_window

from tasks import schemas
from tasks.ingest.store import write_partition
from tasks.operate.probe_programme import ProbeInputError, make_plan, night_budget, read_opt_out
from tasks.workspace import Workspace

from conftest import REPO

DATES = ("2026-11-01", "2026-11-02")


@pytest.fixture(scope="module")
def ws(tmp_path_factory) -> Workspace:
    """Two stored nights (the small window's rows split between them) and a version for each, the
    second warm-started from (and so judged against) the first."""
    ws = Workspace.at(tmp_path_factory.mktemp("probe") / "ws")
    window = small_window(seed=5)
    for k, date in enumerate(DATES):
        part = window.iloc[k::2].reset_index(drop=True)
        part = part.assign(event_time=pd.Timestamp(f"{date}T12:00:00Z"), input_file=f"logs/dt={date}/a.parquet",
                           input_row=range(len(part)))
        write_partition(ws, date, part)
        publish_night(ws, date, seed=5)
    return ws


def test_budget_of_a_stored_night_is_judged_against_its_base(ws) -> None:
    budget, vid = night_budget(ws, CFG, DATES[1])
    assert vid.startswith("v20261102") and budget.paired_with == "live"
    stored = pq.read_table(ws.store / f"dt={DATES[1]}" / "part-0.parquet").to_pandas()
    assert budget.today == int((stored["source"] == schemas.PROBE).sum())
    assert budget.active_members == 30
    assert [p.modelled for p in budget.points] == [p.probes_per_night > budget.today for p in budget.points]


def test_budget_of_a_night_without_a_version_is_refused(ws) -> None:
    with pytest.raises(ProbeInputError, match="no version published for 2026-10-30"):
        night_budget(ws, CFG, "2026-10-30")


def test_plan_leaves_out_opted_out_members_and_is_reproducible(ws, tmp_path) -> None:
    members = sorted(small_window(seed=5)["user_id"].unique())
    out = set(members[:5])
    one = make_plan(ws, CFG, "2026-11-03", 12, out, tmp_path / "one.parquet")
    two = make_plan(ws, CFG, "2026-11-03", 12, out, tmp_path / "two.parquet")
    plan = pd.read_parquet(one.path)
    assert pq.read_schema(one.path).equals(schemas.PROBE_PLAN, check_metadata=False)
    assert len(plan) == 12 and not set(plan["member_id"]) & out
    assert (plan["drawn_by"] == "uniform").sum() == round(12 * CFG.probe.plan_uniform_share)
    assert one.window_end == "2026-11-02" and one.eligible == 25 and one.opted_out == 5
    pd.testing.assert_frame_equal(plan, pd.read_parquet(two.path))
    other_day = make_plan(ws, CFG, "2026-11-04", 12, out, tmp_path / "three.parquet").plan
    assert set(other_day["member_id"]) != set(plan["member_id"])   # the uniform share is drawn per date


def test_opt_out_files(tmp_path) -> None:
    (tmp_path / "o.csv").write_text("member_id\nmember-000001\n")
    pd.DataFrame({"member_id": ["member-000002"]}).to_parquet(tmp_path / "o.parquet")
    assert read_opt_out(tmp_path / "o.csv") == {"member-000001"}
    assert read_opt_out(tmp_path / "o.parquet") == {"member-000002"}
    with pytest.raises(ProbeInputError, match="--opt-out: no file"):
        read_opt_out(tmp_path / "missing.csv")


def _cli(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if not k.startswith("TAREWISE_")}
    env["PYTHONPATH"] = str(REPO)
    return subprocess.run([sys.executable, "-m", "flows.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=180)


def test_both_commands_through_the_command_line(ws, tmp_path) -> None:
    budget = _cli(["probe-budget", "--workspace", str(ws.root)], tmp_path)
    assert budget.returncode == 0, budget.stderr[-2000:]
    assert f"probe budget, night {DATES[1]}" in budget.stdout and "today" in budget.stdout
    assert "probes a night the gate detects a 0.02 regression 80% of the time" in " ".join(budget.stdout.split())
    (tmp_path / "optout.csv").write_text("member_id\n" + "\n".join(sorted(small_window(seed=5)["user_id"].unique())[:3]))
    plan = _cli(["probe-plan", "--budget", "6", "--date", "2026-11-03", "--opt-out", str(tmp_path / "optout.csv"),
                 "--workspace", str(ws.root)], tmp_path)
    assert plan.returncode == 0, plan.stderr[-2000:]
    written = ws.root / "probe-plans" / "2026-11-03.parquet"
    assert written.exists()
    got = pd.read_parquet(written)
    assert len(got) == 6 and "3 opted out" in plan.stdout
    assert "advice" in plan.stdout
