"""The random probe's budget and plan over a workspace: which stored night and models they read, where a
plan is written (``tarewise probe-budget``, ``tarewise probe-plan``; the maths is in
``tasks/evaluate/probe_budget.py`` and ``tasks/evaluate/probe_plan.py``).

Each plan is advice: it lists members and why; the operator's policy decides who sees the card.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pyarrow as pa

from tasks import schemas
from tasks.config import Config
from tasks.dates import shift
from tasks.engine.checkpoint import Checkpoint
from tasks.evaluate.probe_budget import Budget, budget_from_window
from tasks.evaluate.probe_plan import PLANS_DIR, choose, facts_from_window, opted_out_members
from tasks.files import atomic_write_table
from tasks.ingest.store import read_window
from tasks.publish.versions import list_versions, live_version, load_checkpoint
from tasks.workspace import Workspace


class ProbeInputError(ValueError):
    """What the command was asked cannot be answered from this workspace (one line, with the fix)."""


def plans_folder(ws: Workspace) -> Path:
    """Where ``tarewise probe-plan`` writes by default: ``<workspace>/probe-plans/<date>.parquet``."""
    return ws.root / PLANS_DIR


def version_of_night(ws: Workspace, run_date: str) -> dict | None:
    """The newest published version of ``run_date`` (its manifest with ``version_id``), or None."""
    of_night = [m for m in list_versions(ws) if m.get("run_date") == run_date and m.get("state") != "damaged"]
    return of_night[-1] if of_night else None


def nights_with_versions(ws: Workspace) -> list[str]:
    return sorted({str(m["run_date"]) for m in list_versions(ws) if m.get("run_date") and m.get("state") != "damaged"})


def night_budget(ws: Workspace, cfg: Config, run_date: str) -> tuple[Budget, str]:
    """The probe budget of night ``run_date``: its version's model judged against its base version (the
    live model of that night), else its own shadow model. Returns the budget and the version id."""
    manifest = version_of_night(ws, run_date)
    if manifest is None:
        raise ProbeInputError(f"no version published for {run_date} in {ws.versions}")
    vid = manifest["version_id"]
    cand = load_checkpoint(ws, vid)
    if cand is None:
        raise ProbeInputError(f"version {vid} has no model folder; `tarewise status` says what is damaged")
    baseline, name = None, "unpaired"
    base_id = manifest.get("base_version")
    if base_id and (ws.versions / base_id / "model").exists():
        baseline, name = load_checkpoint(ws, base_id), "live"
    elif (ws.versions / vid / "shadow").exists():
        baseline, name = load_checkpoint(ws, vid, "shadow"), "shadow"
    window = read_window(ws, run_date, cfg.window.days)
    try:
        return budget_from_window(window, run_date, cand, baseline, name, cfg, plans_folder(ws)), vid
    except ValueError as exc:
        raise ProbeInputError(f"night {run_date}: {exc}") from None


@dataclass(frozen=True)
class PlanResult:
    plan: pd.DataFrame
    version_id: str
    window_end: str
    eligible: int
    opted_out: int
    path: Path


def read_opt_out(path: Path) -> set[str]:
    """Member ids in an operator's opt-out list: Parquet, or CSV with a header (``member_id`` column, or a
    single column). Raises :class:`ProbeInputError` naming the file."""
    try:
        table = pd.read_parquet(path) if path.suffix.lower() in (".parquet", ".pq") else pd.read_csv(path, dtype=str)
    except FileNotFoundError:
        raise ProbeInputError(f"--opt-out: no file at {path}") from None
    except Exception as exc:  # noqa: BLE001 - any unreadable file is the user's to fix, named
        raise ProbeInputError(f"--opt-out: {path} cannot be read as {'Parquet' if path.suffix.lower() in ('.parquet', '.pq') else 'CSV'} "
                              f"({type(exc).__name__}: {' '.join(str(exc).split())[:160]})") from None
    try:
        return opted_out_members(table, str(path))
    except ValueError as exc:
        raise ProbeInputError(f"--opt-out: {exc}") from None


def make_plan(ws: Workspace, cfg: Config, plan_date: str, budget: int, opted_out: set[str],
              out: Path | None = None, model: Checkpoint | None = None) -> PlanResult:
    """Write the plan for ``plan_date``: the live version's model over the window ending the day before
    (what is known when the plan is made). Seeded by ``model.seed`` and the date, so the same inputs give
    the same plan."""
    vid = live_version(ws)
    if vid is None:
        raise ProbeInputError(f"no live version in {ws.root}; run a night first (`tarewise run`)")
    ckpt = model or load_checkpoint(ws, vid)
    if ckpt is None:
        raise ProbeInputError(f"live version {vid} has no model folder; `tarewise status` says what is damaged")
    end = shift(plan_date, -1)
    window = read_window(ws, end, cfg.window.days)
    if window.empty:
        raise ProbeInputError(f"no stored ratings in the {cfg.window.days} days up to {end}: no active members to plan for")
    facts = facts_from_window(window, ckpt, cfg)
    seed = (cfg.model.seed * 1_000_003 + int(plan_date.replace("-", ""))) % 2**32
    plan = choose(facts, budget, cfg.probe.plan_uniform_share, seed, opted_out)
    path = out or plans_folder(ws) / f"{plan_date}.parquet"
    path.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_table(path, pa.Table.from_pandas(plan, schema=schemas.PROBE_PLAN, preserve_index=False))
    n_out = int(facts.index.isin(list(opted_out)).sum())
    return PlanResult(plan, vid, end, len(facts) - n_out, n_out, path)
