"""Table rendering: what a command prints from the plain dicts and records the flows and tasks return.

Builders return a ``rich.table.Table`` (tests render it into a string); ``print_*`` functions print a
table with the lines that belong under it on the CLI console.
"""

from __future__ import annotations

from rich.table import Table

from flows.cli.common import console


def print_night(out: dict) -> None:
    """One night's outcome (the nightly flow's return value): evaluation table, gate decision, alerts;
    a night that did not finish prints its status and message instead."""
    if out["status"] != "done":
        console.print(f"{out['run_date']}: [yellow]{out['status']}[/] - {out.get('message', '')}")
        return
    t = Table(title=f"night {out['run_date']} -> version {out['version_id']} ({out['state']})")
    for col in ("model", "held-out n", "MAE", "MAE interval", "RMSE"):
        t.add_column(col)
    for name in ("candidate", "shadow", "live"):
        e = out["evaluation"].get(name)
        if e:
            t.add_row(name, str(e["n"]), f"{e['mae']:.4f}", f"{e['mae_lo']:.4f} - {e['mae_hi']:.4f}",
                      f"{e['rmse']:.4f}")
    console.print(t)
    console.print(f"gate: {'promote' if out['gate']['promote'] else 'hold'} - {out['gate']['reason']}",
                  highlight=False)
    for a in out.get("alerts", []):
        console.print(f"[bold magenta]alert[/] {a}", highlight=False)


def versions_table(manifests: list[dict], title: str) -> tuple[Table, list[str]]:
    """(one row per version manifest: state, run date, method, held-out MAE of each model, gate decision;
    one ``"<version>: <gate reason>"`` line per version, printed under the table because reasons are long)."""
    t = Table(title=title)
    for col in ("version", "state", "run date", "method", "MAE cand.", "MAE shadow", "MAE live", "gate"):
        t.add_column(col, no_wrap=True)
    reasons = []
    for m in manifests:
        mt = m.get("metrics", {})
        f = lambda k: f"{mt[k]['mae']:.4f}" if mt.get(k) else "-"  # noqa: E731
        gate = m.get("gate", {})
        t.add_row(m["version_id"], m["state"], m.get("run_date", ""), m.get("method", ""), f("candidate"),
                  f("shadow"), f("live"), f"{'promote' if gate.get('promote') else 'hold'} vs "
                  f"{gate.get('compared_to', '?')}")
        reasons.append(f"{m['version_id']}: {m.get('damage') or gate.get('reason', '')}")
    return t, reasons


def runs_table(runs: list[dict]) -> Table:
    """Ledger rows as ``tasks.operate.status`` gives them, newest last, status coloured."""
    t = Table(title=f"last {len(runs)} run(s)")
    for col in ("started (UTC)", "kind", "night", "status", "version", "state", "seconds", "message"):
        t.add_column(col, overflow="fold")
    colour = {"done": "green", "failed": "red", "interrupted": "red", "running": "yellow", "skipped": "yellow"}
    for r in runs:
        c = colour.get(r["status"], "white")
        t.add_row(r["started_at"], r["kind"], r["run_date"], f"[{c}]{r['status']}[/]", r["version_id"] or "-",
                  r["state"] or "-", "-" if r["seconds"] is None else f"{r['seconds']:.1f}", r["message"][:120])
    return t


def alerts_table(alerts: list[dict], days: int, as_of: str) -> Table:
    """Alert records of the ``days`` nights up to ``as_of``; explanations cut at 200 characters."""
    a = Table(title=f"alerts in the {days} nights up to {as_of}")
    for col in ("night", "severity", "kind", "status", "explanation"):
        a.add_column(col, overflow="fold")
    for r in alerts:
        a.add_row(str(r.get("run_date")), str(r.get("severity")), str(r.get("kind")), str(r.get("status")),
                  str(r.get("explanation", ""))[:200])
    return a


def plan_table(plan, title: str) -> Table:
    """A backfill plan (``tasks.operate.backfill_plan.plan_backfill``): each date, run or skip, and why."""
    t = Table(title=title)
    for col in ("date", "action", "why"):
        t.add_column(col, overflow="fold")
    for p in plan:
        t.add_row(p.run_date, "[green]run[/]" if p.action == "run" else "[dim]skip[/]", p.reason)
    return t


def print_backfill(out: dict) -> None:
    """A finished backfill (the backfill flow's return value): one row per night, then the dates skipped,
    the live version and what retention removed."""
    t = Table(title=f"backfill {out['start']}..{out['end']} (--live {out['live_mode']})")
    for col in ("date", "status", "version", "state", "seconds", "held-out MAE", "note"):
        t.add_column(col, overflow="fold")
    for n in out["nights"]:
        mae = f"{n['mae']:.4f} (n={n['heldout']})" if n.get("mae") is not None else "-"
        t.add_row(n["run_date"], n["status"], n.get("version_id") or "-", n.get("state") or "-",
                  f"{n['seconds']:.1f}", mae, n.get("message") or "")
    console.print(t)
    if out["skipped"]:
        console.print(f"{len(out['skipped'])} date(s) skipped as already done (--dry-run shows each, --force re-runs)")
    console.print(f"live version: {out['live_version'] or 'none'}", highlight=False)
    if out.get("retention"):
        r = out["retention"]
        console.print(f"retention as of {r['as_of']}: {len(r['versions'])} version(s), "
                      f"{len(r['quarantine_dates'])} quarantine partition(s), "
                      f"{r['metrics_rows']} metric row(s) removed")


def sweep_table(rows: list[dict], start: str, end: str) -> Table:
    """A sweep's result rows (the sweep flow's ``rows``): mean held-out probe MAE per setting, with notes
    for the lowest MAE, a failed setting and nights with too little data."""
    t = Table(title=f"held-out probe MAE by setting, mean over nights {start}..{end}")
    for col in ("setting", "nights", "held-out n", "MAE", "shadow MAE", "note"):
        t.add_column(col, overflow="fold")
    f = lambda x: f"{x:.4f}" if x is not None else "-"  # noqa: E731
    for r in rows:
        note = f"failed {r['error']}" if r["error"] else ("lowest MAE" if r["best"] else "")
        if r["skipped"]:
            note = (note + "; " if note else "") + f"{r['skipped']} night(s) too little data"
        t.add_row(r["label"], str(r["nights"]), str(r["heldout"]), f(r["mae"]), f(r["shadow_mae"]), note)
    return t
