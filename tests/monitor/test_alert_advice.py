"""What an alert tells an operator to do (tasks/monitor/alert_advice.py): what to check, which command
shows more, when it clears; in the deployment's words, naming the settings; and "when it clears" is what
the alert rules really do.

Invented numbers of the library-app demo.
"""

from __future__ import annotations

import datetime as dt

import pandas as pd
import pytest

from tasks.config import Config, LabelsConfig
from tasks.monitor.alert_advice import advice, with_advice
from tasks.monitor.alert_rules import KIND_COVERAGE, KIND_QUARANTINE, KIND_SKEW, KIND_WORSE, guard_alerts, skew_alerts

KINDS = (KIND_SKEW, KIND_COVERAGE, KIND_QUARANTINE, KIND_WORSE)
DEMO_WORDS = LabelsConfig(user="member", users="members", item="title", items="titles", rating_unit="stars",
                          rating_symbol="\u2605")


@pytest.mark.parametrize("kind", KINDS)
def test_every_kind_says_what_to_check_which_command_and_when_it_clears(kind):
    a = advice(kind, "warning", "2026-11-08", Config())
    assert set(a) == {"check", "more", "clears"} and all(len(v) > 40 for v in a.values())
    assert "`tarewise " in a["more"]                       # a command, ready to paste
    assert "members" not in " ".join(a.values()) and "titles" not in " ".join(a.values())
    assert advice("no_such_kind", "warning", "2026-11-08", Config()) == {}


def test_advice_names_the_sources_to_check_and_the_settings_in_force():
    cfg = Config()
    skew = advice(KIND_SKEW, "critical", "2026-11-08", cfg)
    for thing in ("the day's sources", "campaign", "probe card"):
        assert thing in skew["check"], thing
    assert "`tarewise report --date 2026-11-08`" in skew["more"]
    assert "drift.baseline_nights = 14" in skew["clears"] and "night 8" in skew["clears"]
    coverage = advice(KIND_COVERAGE, "critical", "2026-10-01", cfg)
    assert "probe card" in coverage["check"] and "0.50%" in coverage["clears"]
    quarantine = advice(KIND_QUARANTINE, "warning", "2026-11-05", cfg)
    assert "quarantine/dt=2026-11-05/" in quarantine["check"] and "`tarewise run --date 2026-11-05`" in quarantine["more"]
    assert "2.00%" in quarantine["clears"] and "withdrawn" in quarantine["clears"]


def test_advice_uses_the_deployments_words_and_says_when_the_gate_holds():
    cfg = Config().model_copy(update={"labels": DEMO_WORDS})
    check = advice(KIND_SKEW, "critical", "2026-11-08", cfg)["check"]
    assert "how members choose what to rate" in check and "per-member skew" in check
    assert "holds the night's candidate" not in advice(KIND_SKEW, "critical", "2026-11-08", cfg)["clears"]
    holding = cfg.model_copy(update={"gate": cfg.gate.model_copy(update={"hold_on_alert": "critical"})})
    assert "holds the night's candidate (gate.hold_on_alert = \"critical\")" in \
        advice(KIND_SKEW, "critical", "2026-11-08", holding)["clears"]
    assert "holds" not in advice(KIND_SKEW, "warning", "2026-11-08", holding)["clears"]


def test_with_advice_fills_every_alert_and_the_record_carries_it():
    cfg = Config()
    night = {"run_date": "2026-11-05", "quarantine_share": 0.03, "probe_coverage": 0.001, "active_users": 900}
    alerts = with_advice(guard_alerts(night, cfg), cfg)
    assert [a.kind for a in alerts] == [KIND_COVERAGE, KIND_QUARANTINE]
    for a in alerts:
        assert a.advice == advice(a.kind, a.severity, a.run_date, cfg)
        assert a.to_record()["advice"] == dict(a.advice)


def test_a_lasting_skew_change_stops_alerting_when_the_advice_says():
    """"Clears ... from about its night 8" (baseline_nights = 14): the band's median moves to the new level
    once the change fills more than half of the baseline, checked with the real rule."""
    cfg = Config()
    day = dt.date(2024, 1, 1)
    rows = [{"run_date": str(day + dt.timedelta(i)), "skew_mean_shift": 0.30 + 0.01 * (i % 3 - 1),
             "skew_w1": 0.35 + 0.01 * (i % 2)} for i in range(14)]
    alerting = []
    for k in range(1, 13):
        night = {"run_date": str(day + dt.timedelta(13 + k)), "skew_mean_shift": 0.90 + 0.01 * (k % 3 - 1),
                 "skew_w1": 0.95 + 0.01 * (k % 2)}
        if skew_alerts(night, pd.DataFrame(rows), cfg):
            alerting.append(k)
        rows.append(night)
    settle = cfg.drift.baseline_nights // 2 + 1
    assert alerting == list(range(1, settle))
    assert f"night {settle}" in advice(KIND_SKEW, "critical", "2024-01-15", cfg)["clears"]
