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
    if out["gate"].get("awaiting_approval"):
        console.print(f"to approve: tarewise approve {out['version_id']}; to turn it down: tarewise reject "
                      f"{out['version_id']} --reason ...", highlight=False, markup=False)
    for a in out.get("alerts", []):
        console.print(f"[bold magenta]alert[/] {a}", highlight=False)
    warning = (out.get("message") or "").partition("; report warning: ")[2]
    if warning:
        console.print("[yellow]report warning[/]: " + warning.replace("[", r"\["), highlight=False, soft_wrap=True)


def versions_table(manifests: list[dict], title: str, reviews: dict | None = None,
                   awaiting: set[str] = frozenset()) -> tuple[Table, list[str]]:
    """(one row per version manifest: state, run date, method, held-out MAE of each model, the candidate's
    margin over the anchor (:func:`anchor_cell`), gate decision;
    one ``"<version>: <gate reason>"`` line per version, printed under the table because reasons are long).
    ``reviews``: a person's approval or rejection per version (``approval.reviews``), added to its line;
    ``awaiting``: versions awaiting approval, shown with that state."""
    reviews = reviews or {}
    t = Table(title=title)
    for col in ("version", "state", "run date", "method", "MAE cand.", "MAE shadow", "MAE live", "vs anchor", "gate"):
        t.add_column(col, no_wrap=True)
    reasons = []
    for m in manifests:
        mt = m.get("metrics", {})
        f = lambda k: f"{mt[k]['mae']:.4f}" if mt.get(k) else "-"  # noqa: E731
        gate = m.get("gate", {})
        t.add_row(m["version_id"], "awaiting approval" if m["version_id"] in awaiting else m["state"],
                  m.get("run_date", ""), m.get("method", ""), f("candidate"),
                  f("shadow"), f("live"), anchor_cell(mt.get("anchor")), f"{'promote' if gate.get('promote') else 'hold'} vs "
                  f"{gate.get('compared_to', '?')}")
        review = reviews.get(m["version_id"])
        reasons.append(f"{m['version_id']}: {m.get('damage') or gate.get('reason', '')}"
                       + (f" [{review['kind']}: {review['message']}]" if review else ""))
    return t, reasons


def anchor_cell(anchor: dict | None) -> str:
    """The candidate's held-out MAE minus the anchor's on the same ratings, and the anchor's id
    (``"+0.0031 v20261105-1"``); ``-`` for versions judged without an anchor (or before anchors existed)."""
    if not isinstance(anchor, dict) or anchor.get("margin") is None:
        return "-"
    return f"{anchor['margin']:+.4f} {anchor.get('version_id', '?')}"


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


def print_night_files(workspace, out: dict) -> None:
    """After a night: where its version folder and its report are (only those that exist)."""
    from pathlib import Path
    root = Path(workspace)
    if out.get("version_id"):
        console.print(f"version: {root / 'versions' / out['version_id']}", highlight=False, soft_wrap=True)
    report = root / "reports" / f"{out['run_date']}.html"
    if report.exists():
        console.print(f"report:  {report}", highlight=False, soft_wrap=True)


def demo_nights_table(ws, dates: list[str]) -> Table:
    """One row per demo night from what the workspace holds: version and state, held-out MAE of the
    candidate and of what the gate compared it with, rows quarantined, alerts raised."""
    from tasks.ledger import latest_by_date
    from tasks.operate.status import recent_alerts
    from tasks.publish.versions import list_versions

    latest = latest_by_date(ws)
    manifests = {m.get("run_date"): m for m in list_versions(ws)}   # oldest first: the newest per night wins
    alerts: dict[str, list[str]] = {}
    if dates:
        span = _day(max(dates)) - _day(min(dates)) + 1
        for a in recent_alerts(ws, max(dates), span):
            alerts.setdefault(str(a.get("run_date")), []).append(f"{a.get('severity')} {a.get('kind')}")
    t = Table(title="demo nights")
    for col in ("night", "version", "state", "held-out n", "MAE", "compared with", "quarantined", "alerts"):
        t.add_column(col, overflow="fold")
    f = lambda x: f"{x:.3f}" if isinstance(x, (int, float)) and x == x else "-"  # noqa: E731 (NaN != NaN)
    for d in dates:
        m = manifests.get(d, {})
        metrics, gate = m.get("metrics") or {}, m.get("gate") or {}
        cand, other = metrics.get("candidate") or {}, metrics.get(gate.get("compared_to", "")) or {}
        row = latest.loc[d] if d in latest.index else None
        quarantined = row["rows_quarantined"] if row is not None else None
        t.add_row(d, m.get("version_id", "-"), m.get("state", "-" if row is None else str(row["status"])),
                  str(cand.get("n", "-")), f(cand.get("mae")),
                  f"{gate.get('compared_to')} {f(other.get('mae'))}" if other else gate.get("compared_to", "-"),
                  "-" if quarantined is None or quarantined != quarantined else str(int(quarantined)),
                  ", ".join(alerts.get(d, [])) or "-")
    return t


def _day(text: str) -> int:
    import datetime as dt
    return dt.date.fromisoformat(text).toordinal()


def print_demo_summary(ws, dates: list[str], logs) -> None:
    """The demo's closing words: the nights, what the invented logs contain, what tarewise made of them
    with the file that shows each, the last night's report and the next commands, ready to paste."""
    import json
    from pathlib import Path

    from flows.cli.preflight import command_prefix, shown_path
    from tasks.operate.demo_story import summary

    console.print(demo_nights_table(ws, dates))
    story_file = Path(logs) / "_truth" / "params.json"
    story = json.loads(story_file.read_text(encoding="utf-8")).get("story", {}) if story_file.exists() else {}
    if story:
        console.print("\n[bold]The invented logs contain[/]")
        for d, what in story.items():
            console.print(f"  {d}  {what}", highlight=False, soft_wrap=True)
    findings = summary(ws, dates)
    console.print("\n[bold]What tarewise made of them[/] (and the file that shows it)")
    for fd in findings:
        console.print(f"  {fd.run_date}  {fd.kind:<10}  {fd.text}\n{'':14}{shown_path(fd.path)}",
                      highlight=False, soft_wrap=True)
    if not findings:
        console.print("  nothing held, quarantined or alerted")
    tw, wsp = command_prefix(), shown_path(ws.root)
    last = max(dates) if dates else None
    if last and (ws.reports / f"{last}.html").exists():
        console.print(f"\nlast night's report: {shown_path(ws.reports / f'{last}.html')}", highlight=False,
                      soft_wrap=True)
    skew = next((fd.run_date for fd in findings if fd.kind == "alert" and "skew" in fd.text), last)
    # The backfill suggestion covers the nights after the last gap in the dates (the story's own nights).
    first = next((b for a, b in zip(reversed(dates[:-1]), reversed(dates)) if _day(b) - _day(a) > 1), None) \
        if dates else None
    console.print("\nnext, ready to paste:")
    for line in (f"{tw} status --workspace {wsp}", f"{tw} versions --workspace {wsp}",
                 *([f"{tw} report --date {skew} --workspace {wsp}"] if skew else []),
                 *([f"{tw} backfill --start {first or min(dates)} --end {last} --dry-run --logs {shown_path(logs)} "
                    f"--workspace {wsp}"] if dates else [])):
        console.print(f"  {line}", highlight=False, soft_wrap=True, markup=False)
    console.print("(the demo's data is invented: a fictional library network's reading app)")
