"""The monitor stage: the alert rules judge tonight's row before the gate; then the row is stored, the
alerts delivered and the report written in one pass; re-runs of a night.

Invented numbers for a library app's nights; the metric rows are written by hand.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from handmade import member_window
from tasks.monitor.alert_delivery import Channels
from tasks.monitor.alert_history import AlertHistory, night_alerts, read_history
from tasks.monitor.metrics_store import read_metrics, row_of, write_night_metrics
from tasks.monitor.night_metrics import compute_night_metrics, with_versions
from tasks.monitor.night_report import alert_night, judge_row, monitor_night
from tasks.monitor.report import render_report

QUIET = {"skew_w1": 0.35, "probe_coverage": 0.03, "active_users": 900}


def _ten_quiet_nights(ws) -> None:
    for day in range(1, 11):
        write_night_metrics(ws, {"run_date": f"2024-03-{day:02d}", "skew_mean_shift": 0.30 + 0.01 * (day % 3), **QUIET})


def _alert(ws, cfg, date: str) -> list[dict]:
    series = read_metrics(ws)
    return alert_night(cfg, row_of(series, date, ws.metrics), series, AlertHistory.read(ws), "nightly", Channels(), env={})


def test_alerts_from_stored_metrics_and_a_rerun_keeps_one_episode(ws, cfg):
    _ten_quiet_nights(ws)
    assert _alert(ws, cfg, "2024-03-10") == []
    write_night_metrics(ws, {"run_date": "2024-03-11", "skew_mean_shift": 0.9, **QUIET, "skew_w1": 0.95})
    [rec] = _alert(ws, cfg, "2024-03-11")
    assert (rec["kind"], rec["status"], rec["alert_id"]) == ("skew_shift", "new", "skew_shift-2024-03-11")
    # a re-run of the same night keeps one episode and one count
    [again] = _alert(ws, cfg, "2024-03-11")
    assert (again["alert_id"], again["count"]) == ("skew_shift-2024-03-11", 1)
    assert len(night_alerts(read_history(ws), "2024-03-11")) == 1


def test_rerun_that_no_longer_alerts_withdraws_the_earlier_alert(ws, cfg):
    _ten_quiet_nights(ws)
    write_night_metrics(ws, {"run_date": "2024-03-11", "skew_mean_shift": 0.9, **QUIET, "skew_w1": 0.95})
    [rec] = _alert(ws, cfg, "2024-03-11")
    assert [a["alert_id"] for a in night_alerts(read_history(ws), "2024-03-11")] == [rec["alert_id"]]
    # corrected logs: the same night re-run is ordinary now
    write_night_metrics(ws, {"run_date": "2024-03-11", "skew_mean_shift": 0.31, **QUIET})
    assert _alert(ws, cfg, "2024-03-11") == []
    assert night_alerts(read_history(ws), "2024-03-11") == []
    assert read_history(ws)[-1]["phase"] == "withdrawn"
    # and the withdrawn night does not make the next night's alert an "ongoing" one
    write_night_metrics(ws, {"run_date": "2024-03-12", "skew_mean_shift": 0.9, **QUIET, "skew_w1": 0.95})
    [nxt] = _alert(ws, cfg, "2024-03-12")
    assert (nxt["status"], nxt["alert_id"], nxt["count"]) == ("new", "skew_shift-2024-03-12", 1)


def _night_row(date: str, jump: float, scale, versions: dict | None = None) -> dict:
    """A computed row for ``date``: the hand-built window moved to that night, organic ratings up by ``jump``."""
    w = member_window()
    w["dt"] = np.where(w["dt"] == "2024-05-02", date, "2000-01-01")
    w.loc[w["source"] == "organic", "rating"] = (w.loc[w["source"] == "organic", "rating"] + jump).clip(1, 5)
    return compute_night_metrics(date, w, scale, 0.5, volumes={"rows_read": 20, "rows_ingested": 20,
                                                               "rows_quarantined": 0}, versions=versions)


def test_one_pass_stores_alerts_and_reports_what_a_rerender_gives(ws, cfg):
    dates = list(pd.date_range("2024-05-01", periods=9).strftime("%Y-%m-%d"))
    for i, date in enumerate(dates):
        row = _night_row(date, 1.5 if i == len(dates) - 1 else 0.05 * (i % 2), cfg.scale)
        done = monitor_night(ws, cfg, judge_row(ws, cfg, row), "nightly", Channels(), env={})
    # the row is stored, tonight's alerts are those the history holds, the lines name them
    assert read_metrics(ws)["run_date"].tolist() == dates
    assert done.alerts and done.alerts == night_alerts(read_history(ws), dates[-1])
    assert done.alert_lines()[0].startswith(f"{done.alerts[0]['severity']}: {done.alerts[0]['kind']} - ")
    assert done.markdown.startswith("# tarewise night") and "alert(s)" in done.markdown
    # the report written in the pass is byte for byte what `tarewise report --date` renders from storage
    written = done.report.read_bytes(), done.report.with_suffix(".json").read_bytes()
    html, js = render_report(ws, dates[-1], cfg)
    assert html == done.report and (html.read_bytes(), js.read_bytes()) == written


def test_the_alerts_judged_before_the_gate_are_those_the_stored_night_raises(ws, cfg, tmp_path):
    """The flow asks the rules before the gate decides (gate.hold_on_alert): judging the computed row
    gives the alerts the rules give on the row as stored, and storing it adds the gate's outcome."""
    from tasks.workspace import Workspace
    dates = list(pd.date_range("2024-05-01", periods=9).strftime("%Y-%m-%d"))
    twin = Workspace.at(tmp_path / "twin")
    for i, date in enumerate(dates):
        row = _night_row(date, 1.5 if i == len(dates) - 1 else 0.05 * (i % 2), cfg.scale, {"candidate": f"v{i}"})
        measured = judge_row(ws, cfg, row)
        assert measured.row == row                                     # nothing written before the gate
        assert date not in set(read_metrics(ws)["run_date"])
        outcome = {"state": "held", "gate": f"gate reason {i}"}
        done = monitor_night(ws, cfg, measured, "nightly", Channels(), env={}, outcome=outcome)
        # the same night through the store first: the rules on the stored row raise the same alerts
        write_night_metrics(twin, with_versions(row, outcome))
        stored = read_metrics(twin)
        after = alert_night(cfg, row_of(stored, date, twin.metrics), stored, AlertHistory.read(twin), "nightly",
                            Channels(), env={})
        assert [(a["kind"], a["severity"], a["explanation"]) for a in done.alerts] == \
            [(a["kind"], a["severity"], a["explanation"]) for a in after]
    assert measured.alerts_for_gate() == [("warning", "skew_shift")]
    # the stored row carries the gate's outcome, as if compute_night_metrics had been handed it
    full = _night_row(dates[-1], 1.5, cfg.scale, {"candidate": "v8", "state": "held", "gate": "gate reason 8"})
    assert row_of(read_metrics(ws), dates[-1], ws.metrics)["detail_json"] == full["detail_json"]
    assert "gate reason 8" in done.report.read_text(encoding="utf-8")
    # every alert carries what to do about it, also in the history
    assert set(done.alerts[0]["advice"]) == {"check", "more", "clears"}
