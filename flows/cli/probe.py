"""The random probe's two commands: ``probe-budget`` (what more or fewer probe ratings a night would buy)
and ``probe-plan`` (which members to show the probe card to on a date, and why).

Neither runs a flow, so neither imports Prefect. ``probe-budget`` changes nothing; ``probe-plan`` writes
only its plan file. A plan is advice: the operator's policy decides who is asked.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Optional

import typer
from rich.table import Table

from flows.cli.common import ConfigOpt, WorkspaceOpt, console, fail, load
from flows.cli.preflight import check_date, existing_workspace, stored_night, user_error


def _num(x: float, digits: int = 3) -> str:
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else f"{x:.{digits}f}"


def probe_budget(date: Optional[str] = typer.Option(None, "--date", "-d", help="Night to measure (default: the "
                                                    "newest night with a version)."),
                 config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """How the held-out MAE interval, the gate's power to see a regression and the share of members with
    enough own probes change with the nightly probe count, from a stored night's probe ratings."""
    cfg = load(config, None, workspace)
    ws = existing_workspace(cfg, config, workspace)
    from tasks.operate.probe_programme import ProbeInputError, night_budget, nights_with_versions
    nights = nights_with_versions(ws)
    date = stored_night(date, nights, "nights with a version", f"--date: no version published for {{date}} in {ws.versions}",
                        f"no published version in {ws.versions}; run a night first")
    try:
        budget, vid = night_budget(ws, cfg, date)
    except ProbeInputError as exc:
        user_error(str(exc))
    except Exception as exc:  # noqa: BLE001
        fail(exc, "probe-budget")
    t = Table(title=f"probe budget, night {date} (version {vid}; compared with {budget.paired_with})")
    d = f"{budget.regression:g}"
    for col in ("probes a night", "held-out n", "MAE interval width", "closed form", "power at " + d, "false hold",
                f"detectable ({budget.power_target:.0%})", "enough own probes", ""):
        t.add_column(col, justify="right" if col else "left")
    for p in budget.points:
        mark = "modelled" if p.modelled else ("today" if p.probes_per_night == budget.today else "")
        t.add_row(str(p.probes_per_night), str(p.heldout_n), _num(p.width), _num(p.width_formula), f"{p.power:.0%}",
                  f"{p.false_hold:.0%}",
                  _num(p.detectable), "-" if math.isnan(p.own_share) else f"{p.own_share:.0%}", mark)
    console.print(t)
    console.print(budget.sentence(), highlight=False, soft_wrap=True)
    console.print(f"(gate.tolerance_mae = {budget.tolerance:g}, gate.min_heldout = {budget.min_heldout}; "
                  f"{budget.active_members} active members; own probes needed: "
                  f"{_num(budget.own_threshold, 1) if budget.own_threshold is not None else '-'})",
                  highlight=False, soft_wrap=True)
    for note in budget.notes:
        console.print(f"note: {note}", highlight=False, soft_wrap=True)


def probe_plan(budget: int = typer.Option(..., "--budget", "-n", min=1, help="How many members to show the "
                                          "probe card to."),
               date: str = typer.Option(..., "--date", "-d", help="Date the cards are shown (YYYY-MM-DD)."),
               opt_out: Optional[Path] = typer.Option(None, "--opt-out", help="Members who opted out: Parquet "
                                                      "or CSV with a member_id column; never chosen."),
               out: Optional[Path] = typer.Option(None, "--out", help="Where to write the plan (Parquet; "
                                                  "default <workspace>/probe-plans/<date>.parquet)."),
               config: Optional[Path] = ConfigOpt, workspace: Optional[str] = WorkspaceOpt) -> None:
    """Write the list of members to show the probe card to on a date, with the reason for each. The plan
    chooses people, never items; a stated share is drawn uniformly at random (probe.plan_uniform_share)."""
    cfg = load(config, None, workspace)
    check_date(date, "--date", "plan date")
    ws = existing_workspace(cfg, config, workspace)
    from tasks.operate.probe_programme import ProbeInputError, make_plan, read_opt_out
    if out is not None and out.exists() and out.is_dir():
        user_error(f"--out: {out} is a folder; give a file path such as {out / (date + '.parquet')}")
    if out is not None and not out.parent.is_dir():
        user_error(f"--out: folder {out.parent} does not exist")
    try:
        opted = read_opt_out(opt_out) if opt_out is not None else set()
        result = make_plan(ws, cfg, date, budget, opted, out)
    except ProbeInputError as exc:
        user_error(str(exc))
    except Exception as exc:  # noqa: BLE001
        fail(exc, "probe-plan")
    plan = result.plan
    n_plan = int((plan["drawn_by"] == "planned").sum())
    console.print(f"probe plan for {date}: {len(plan)} members ({n_plan} planned, {len(plan) - n_plan} uniform at "
                  f"random) of {result.eligible} eligible active members ({result.opted_out} opted out), from "
                  f"version {result.version_id} and the ratings up to {result.window_end} -> {result.path}",
                  highlight=False, soft_wrap=True)
    if len(plan) < budget:
        console.print(f"note: only {len(plan)} eligible members, fewer than --budget {budget}", highlight=False)
    console.print("The plan is advice: it asks real people, so the operator's policy on consent and on how "
                  "often anyone is asked decides who sees the card.", highlight=False, soft_wrap=True)
