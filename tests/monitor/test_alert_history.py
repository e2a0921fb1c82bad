"""The alert history file: append-only JSON lines, torn lines skipped, the latest record per alert and
night, withdrawals, and which receivers already succeeded."""

from __future__ import annotations

import logging

from tasks.monitor.alert_history import (
    AlertHistory,
    append_history,
    latest_by_night,
    night_alerts,
    read_history,
)
from tasks.monitor.alert_rules import Alert


def _rec(alert_id: str, run_date: str, phase: str = "final", **more) -> dict:
    return {"alert_id": alert_id, "run_date": run_date, "phase": phase, "kind": alert_id.rsplit("-", 3)[0], **more}


def test_torn_history_line_is_skipped_and_later_records_survive(ws, caplog):
    append_history(ws, _rec("a-1", "2024-03-20"))
    with ws.alerts.open("a") as fh:
        fh.write('{"alert_id": "a-2", "run_da')  # a crash mid-write
    append_history(ws, _rec("a-3", "2024-03-21"))
    with caplog.at_level(logging.WARNING, logger="tarewise.alerts"):
        ids = [r["alert_id"] for r in read_history(ws)]
    assert ids == ["a-1", "a-3"]
    assert f"{ws.alerts} line 2" in caplog.text


def test_append_returns_the_record_as_read_back(ws):
    history = AlertHistory.read(ws)
    got = history.append({"zeta": 1, "alert_id": "x-2024-03-21", "band": (0.1, None), "run_date": "2024-03-21"})
    assert got == {"alert_id": "x-2024-03-21", "band": [0.1, None], "run_date": "2024-03-21", "zeta": 1}
    assert list(got) == sorted(got)                     # keys as the file holds them
    assert history.records == read_history(ws) == [got]


def test_latest_by_night_keeps_the_last_record_and_drops_withdrawn():
    records = [_rec("skew_shift-2024-03-20", "2024-03-20", "pending"),
               _rec("skew_shift-2024-03-20", "2024-03-20"),
               _rec("probe_coverage_low-2024-03-21", "2024-03-21"),
               _rec("skew_shift-2024-03-20", "2024-03-21", count=2),
               _rec("probe_coverage_low-2024-03-21", "2024-03-21", "withdrawn"),
               {"run_date": "2024-03-21", "note": "no alert id: ignored"}]
    got = latest_by_night(records, lambda d: d >= "2024-03-20")
    assert [(r["alert_id"], r["run_date"], r["phase"]) for r in got] == [
        ("skew_shift-2024-03-20", "2024-03-20", "final"), ("skew_shift-2024-03-20", "2024-03-21", "final")]
    assert [r.get("count") for r in night_alerts(records, "2024-03-21")] == [2]


def _alert(kind: str, date: str) -> Alert:
    return Alert(kind=kind, severity="warning", metric="skew_mean_shift", value=0.6, band=(0.1, 0.4),
                 explanation="(invented)", run_date=date, alert_id=f"{kind}-{date}", first_date=date, last_date=date)


def test_withdraw_stale_appends_only_for_alerts_no_longer_raised(ws):
    history = AlertHistory.read(ws)
    for kind in ("skew_shift", "probe_coverage_low"):
        history.append(_rec(f"{kind}-2024-03-21", "2024-03-21", kind=kind))
    gone = history.withdraw_stale("2024-03-21", [_alert("skew_shift", "2024-03-21")])
    assert [(r["alert_id"], r["phase"]) for r in gone] == [("probe_coverage_low-2024-03-21", "withdrawn")]
    assert [r["alert_id"] for r in night_alerts(read_history(ws), "2024-03-21")] == ["skew_shift-2024-03-21"]
    assert history.withdraw_stale("2024-03-21", [_alert("skew_shift", "2024-03-21")]) == []


def test_delivered_before_reads_final_records_of_that_night_only(ws):
    history = AlertHistory.read(ws)
    ok, bad = {"outcome": "ok"}, {"outcome": "failed"}
    history.append(_rec("skew_shift-2024-03-21", "2024-03-21", delivery={
        "event": ok, "webhook": bad, "blocks": {"slack/ops": ok, "email/ops": bad}}))
    history.append(_rec("skew_shift-2024-03-21", "2024-03-21", "pending", delivery={"webhook": ok}))
    history.append(_rec("skew_shift-2024-03-21", "2024-03-22", delivery={"webhook": ok}))
    assert history.delivered_before("skew_shift-2024-03-21", "2024-03-21") == {"event", "block:slack/ops"}
