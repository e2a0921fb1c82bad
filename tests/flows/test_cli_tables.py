"""What the CLI prints (flows/cli/tables.py): tables built from the dicts flows and tasks return, with the
placeholders and notes a reader relies on. Rendered as plain text, the way a log or CI shows them."""

from __future__ import annotations

import io
from types import SimpleNamespace

from rich.console import Console
from rich.table import Table

from flows.cli.tables import (alerts_table, plan_table, print_backfill, print_night, runs_table, sweep_table,
                              versions_table)


def text(table: Table) -> str:
    out = Console(file=io.StringIO(), width=200, color_system=None)
    out.print(table)
    return out.file.getvalue()


def rows(table: Table) -> list[list[str]]:
    """Cell texts row by row (markup as given to the table)."""
    return [list(r) for r in zip(*(c.cells for c in table.columns))]


def _eval(mae: float, n: int = 120) -> dict:
    return {"n": n, "mae": mae, "mae_lo": mae - 0.05, "mae_hi": mae + 0.05, "rmse": mae + 0.3}


def test_a_night_that_did_not_finish_prints_its_status_and_message_only(capsys) -> None:
    print_night({"run_date": "2026-11-03", "status": "skipped", "message": "too few probe ratings"})
    assert capsys.readouterr().out.strip() == "2026-11-03: skipped - too few probe ratings"


def test_a_finished_night_lists_the_models_it_evaluated_then_gate_and_alerts(capsys) -> None:
    print_night({"run_date": "2026-11-03", "status": "done", "version_id": "v20261103-1", "state": "held",
                 "evaluation": {"candidate": _eval(0.8123), "shadow": _eval(0.8456), "live": None},
                 "gate": {"promote": False, "reason": "candidate not better than live"},
                 "alerts": ["selection skew shifted for segment 'audiobook'"]})
    out = capsys.readouterr().out
    assert "night 2026-11-03 -> version v20261103-1 (held)" in out
    assert "0.8123" in out and "0.7623 - 0.8623" in out and "0.8456" in out
    models = [line.split("│")[1].strip() for line in out.splitlines() if line.count("│") > 2]
    assert models == ["candidate", "shadow"]                          # no live model yet: no row
    assert "gate: hold - candidate not better than live" in out
    assert "alert selection skew shifted for segment 'audiobook'" in out


def test_versions_table_fills_missing_metrics_and_gate_fields() -> None:
    full = {"version_id": "v1", "state": "live", "run_date": "2026-11-01", "method": "calibrated",
            "metrics": {"candidate": {"mae": 0.81234}, "shadow": {"mae": 0.9}, "live": None},
            "gate": {"promote": True, "compared_to": "none", "reason": "first version"}}
    bare = {"version_id": "v0", "state": "retired"}
    table, reasons = versions_table([full, bare], "versions in /ws")
    assert rows(table) == [["v1", "live", "2026-11-01", "calibrated", "0.8123", "0.9000", "-", "-", "promote vs none"],
                           ["v0", "retired", "", "", "-", "-", "-", "-", "hold vs ?"]]
    assert reasons == ["v1: first version", "v0: "]


def test_versions_table_shows_the_candidates_margin_over_its_anchor() -> None:
    anchored = {"version_id": "v20261103-1", "state": "held", "run_date": "2026-11-03", "method": "per_user",
                "metrics": {"candidate": {"mae": 0.82}, "live": {"mae": 0.815},
                            "anchor": {"version_id": "v20261101-1", "mae": 0.80, "candidate_mae": 0.8123,
                                       "margin": 0.0123, "n": 97}},
                "gate": {"promote": False, "compared_to": "live", "reason": "worse than the anchor"}}
    table, _ = versions_table([anchored], "versions in /ws")
    assert [c.header for c in table.columns][7] == "vs anchor"
    assert rows(table)[0][7] == "+0.0123 v20261101-1"


def test_runs_table_colours_status_and_shortens_long_messages() -> None:
    run = {"started_at": "2026-11-02 02:30", "kind": "nightly", "run_date": "2026-11-01", "status": "failed",
           "version_id": None, "state": None, "seconds": None, "message": "x" * 300}
    other = {**run, "status": "restarted", "seconds": 12.345, "version_id": "v1", "state": "live", "message": ""}
    got = rows(runs_table([run, other]))
    assert got[0] == ["2026-11-02 02:30", "nightly", "2026-11-01", "[red]failed[/]", "-", "-", "-", "x" * 120]
    assert got[1][3:7] == ["[white]restarted[/]", "v1", "live", "12.3"]
    assert runs_table([run, other]).title == "last 2 run(s)"


def test_alerts_table_shortens_explanations() -> None:
    alert = {"run_date": "2026-11-01", "severity": "warning", "kind": "skew_shift", "status": "new",
             "explanation": "y" * 250}
    table = alerts_table([alert, {"run_date": "2026-11-02"}], 7, "2026-11-02")
    assert table.title == "alerts in the 7 nights up to 2026-11-02"
    assert rows(table) == [["2026-11-01", "warning", "skew_shift", "new", "y" * 200],
                           ["2026-11-02", "None", "None", "None", ""]]


def test_plan_table_marks_runs_and_skips() -> None:
    plan = [SimpleNamespace(run_date="2026-11-01", action="skip", reason="done already"),
            SimpleNamespace(run_date="2026-11-02", action="run", reason="not run yet")]
    assert rows(plan_table(plan, "plan")) == [["2026-11-01", "[dim]skip[/]", "done already"],
                                              ["2026-11-02", "[green]run[/]", "not run yet"]]


def test_backfill_summary_shows_placeholders_skips_and_retention(capsys) -> None:
    night = {"run_date": "2026-11-01", "status": "done", "version_id": "v1", "state": "live", "seconds": 3.21,
             "mae": 0.75, "heldout": 40, "message": ""}
    empty = {"run_date": "2026-11-02", "status": "skipped", "seconds": 0.5, "message": "no data"}
    out = {"start": "2026-11-01", "end": "2026-11-02", "live_mode": "last", "nights": [night, empty],
           "skipped": ["2026-10-31"], "live_version": None,
           "retention": {"as_of": "2026-11-02", "versions": ["v0"], "quarantine_dates": [], "metrics_rows": 4}}
    print_backfill(out)
    printed = capsys.readouterr().out
    assert "0.7500 (n=40)" in printed and "3.2" in printed and "no data" in printed
    assert "1 date(s) skipped as already done" in printed
    assert "live version: none" in printed
    assert "retention as of 2026-11-02: 1 version(s), 0 quarantine partition(s), 4 metric row(s) removed" in printed
    print_backfill({**out, "skipped": [], "retention": None})
    printed = capsys.readouterr().out
    assert "skipped as already done" not in printed and "retention" not in printed


def test_sweep_table_notes_best_failed_and_thin_settings() -> None:
    base = {"nights": 2, "heldout": 80, "mae": 0.8, "shadow_mae": 0.85, "error": None, "best": False,
            "skipped": 0}
    table = sweep_table([{**base, "label": "method=plain"},
                         {**base, "label": "method=calibrated", "mae": 0.7, "best": True, "skipped": 1},
                         {**base, "label": "method=per_user", "mae": None, "shadow_mae": None,
                          "error": "EngineInputError"}], "2026-11-01", "2026-11-02")
    got = rows(table)
    assert [r[-1] for r in got] == ["", "lowest MAE; 1 night(s) too little data", "failed EngineInputError"]
    assert got[1][3] == "0.7000" and got[2][3:5] == ["-", "-"]
    assert "mean over nights 2026-11-01..2026-11-02" in text(table)
