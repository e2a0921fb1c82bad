"""Nights the schedule owes (tasks/operate/catch_up.py), from ledger rows written by the ledger's own
functions; no Prefect."""

from __future__ import annotations

import datetime as dt

from tasks import ledger
from tasks.config import Config
from tasks.operate.catch_up import due_at_start, gaps, last_slot_night, owed, plan_catch_up


def _night(ws, run_date: str, status: str = "done") -> None:
    rid = ledger.start_run(ws, "nightly", run_date)
    ledger.finish_run(ws, rid, status)


def _cfg(**runtime) -> Config:
    return Config().updated({f"runtime.{k}": v for k, v in runtime.items()})


def test_owed_nights_start_after_the_last_settled_one(ws):
    assert owed(ws, "2026-11-05") == []                  # no history: nothing before the first night
    _night(ws, "2026-11-01")
    _night(ws, "2026-11-02", "failed")
    assert owed(ws, "2026-11-05") == ["2026-11-02", "2026-11-03", "2026-11-04"]
    _night(ws, "2026-11-03", "skipped")                  # an empty day settles its date
    assert owed(ws, "2026-11-05") == ["2026-11-04"]


def test_catch_up_policies_and_per_run_cap(ws):
    _night(ws, "2026-11-01")
    d = "2026-11-06"
    assert plan_catch_up(ws, _cfg(), d).run == ["2026-11-02", "2026-11-03", "2026-11-04", "2026-11-05", d]
    p = plan_catch_up(ws, _cfg(catch_up="last:2"), d)
    assert p.run == ["2026-11-04", "2026-11-05", d] and p.missed == ["2026-11-02", "2026-11-03"]
    p = plan_catch_up(ws, _cfg(catch_up="none"), d)
    assert p.run == [d] and len(p.missed) == 4
    p = plan_catch_up(ws, _cfg(catch_up_per_run=2), d)
    assert p.run == ["2026-11-02", "2026-11-03"] and p.waiting == ["2026-11-04", "2026-11-05", d]


def test_serve_start_owes_only_nights_whose_slot_has_passed(ws):
    cfg = _cfg(schedule="30 2 * * *", timezone="UTC")
    before_slot = dt.datetime(2026, 11, 6, 1, 0, tzinfo=dt.timezone.utc)
    after_slot = dt.datetime(2026, 11, 6, 3, 0, tzinfo=dt.timezone.utc)
    assert last_slot_night(cfg, before_slot) == "2026-11-04" and last_slot_night(cfg, after_slot) == "2026-11-05"
    assert due_at_start(ws, cfg, after_slot) == []       # a fresh workspace owes nothing
    _night(ws, "2026-11-03")
    assert due_at_start(ws, cfg, before_slot) == ["2026-11-04"]
    assert due_at_start(ws, cfg, after_slot) == ["2026-11-04", "2026-11-05"]


def test_gaps_for_status(ws):
    for d, s in [("2026-11-01", "done"), ("2026-11-02", "failed"), ("2026-11-04", "done")]:
        _night(ws, d, s)
    assert gaps(ws, "2026-11-07") == {"holes": ["2026-11-02", "2026-11-03"], "behind": 2, "last": "2026-11-04"}


def test_catch_up_setting_is_validated():
    import pytest
    from tasks.config import ConfigError, parse_config
    assert _cfg(catch_up="LAST:3").runtime.catch_up_limit() == 3
    with pytest.raises(ConfigError, match="runtime.catch_up"):
        parse_config({"runtime": {"catch_up": "some"}}, "test")


def test_status_names_lost_nights_with_the_backfill_that_fills_them(ws):
    from tasks.operate.catch_up import night_findings
    for d, s in [("2026-11-01", "done"), ("2026-11-02", "interrupted"), ("2026-11-03", "done")]:
        _night(ws, d, s)
    found = night_findings(ws, "2026-11-08")
    assert [f.what for f in found] == ["night(s) not done between done ones: 2026-11-02"]
    assert "tarewise backfill --start 2026-11-02 --end 2026-11-02" in found[0].fix
