"""What an operator can do about an alert: what to check, which command shows more, when it clears.

Every alert carries this advice beside its explanation (what moved): in the alert history, in what the
receivers get, and on the report's alert card. The words for people and things come from ``[labels]``
(``cfg.labels``), the limits from the config that raised the alert, so the advice names the settings an
operator would change.

When an alert clears follows from the rules in ``alert_rules``: a skew alert stops when a night's value
is back inside its trailing band, or when a lasting change has become the band (the band's median is
the median of the last ``drift.baseline_nights`` stored nights, so it moves to a new level once more
than half of them sit there); guards are judged each night on their own.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable

from tasks.config import Config, LabelsConfig
from tasks.evaluate.gate import alert_holds
from tasks.monitor.alert_rules import KIND_COVERAGE, KIND_QUARANTINE, KIND_SKEW, KIND_WORSE, Alert


def with_advice(alerts: Iterable[Alert], cfg: Config) -> list[Alert]:
    """``alerts`` with their :func:`advice` filled in."""
    return [dataclasses.replace(a, advice=advice(a.kind, a.severity, a.run_date, cfg)) for a in alerts]


def _gate_note(severity: str, cfg: Config) -> str:
    setting = cfg.gate.hold_on_alert
    if alert_holds(severity, setting):
        return (f" While it is raised, the promotion gate holds the night's candidate "
                f"(gate.hold_on_alert = \"{setting}\"); the live version stays.")
    return ""


def advice(kind: str, severity: str, run_date: str, cfg: Config) -> dict[str, str]:
    """``{"check": ..., "more": ..., "clears": ...}`` for an alert of ``kind`` and ``severity`` raised for
    ``run_date`` (one or two sentences each, plain text); empty for a kind this module does not know."""
    words: LabelsConfig = cfg.labels
    users, user = words.users, words.user
    d, g = cfg.drift, cfg.gate
    report = f"`tarewise report --date {run_date}`"
    if kind == KIND_SKEW:
        settle = d.baseline_nights // 2 + 1
        return {
            "check": (f"What changed in how {users} choose what to rate on {run_date}: the day's sources (a new "
                      f"app release, import or partner feed sending ratings), a campaign or prompt asking "
                      f"{users} to rate (favourites, a new feature), and whether the probe card was still "
                      f"shown to {users} drawn at random. The per-{user} skew section shows which segment "
                      "moved."),
            "more": (f"{report} re-renders this page; `tarewise status` lists the alerts of the last nights; "
                     "`tarewise versions` shows whether the night's candidate went live."),
            "clears": (f"The first night whose value is back inside its band; alerts within "
                       f"drift.cooldown_nights = {d.cooldown_nights} nights of each other count as one episode. "
                       f"A change that lasts becomes the usual range once it fills more than half of the last "
                       f"drift.baseline_nights = {d.baseline_nights} nights (from about its night {settle}), and "
                       "the alert stops: decide before then whether the change is wanted."
                       + _gate_note(severity, cfg)),
        }
    if kind == KIND_COVERAGE:
        return {
            "check": (f"The probe card: was it shown on {run_date} (an app release, a feature flag, a consent or "
                      f"opt-out change)? The day's sources: did probe ratings arrive, with the source label "
                      f"input.probe_label = \"{cfg.input.probe_label}\"? Without probe ratings the gate has "
                      "nothing to judge the candidate on."),
            "more": (f"{report} (volumes: {users} with a probe rating); `tarewise versions` shows whether the "
                     "candidate was held for too few held-out probe ratings."),
            "clears": (f"The next night on which at least {d.min_probe_coverage:.2%} of active {users} give a "
                       "probe rating (drift.min_probe_coverage); each night is judged on its own."
                       + _gate_note(severity, cfg)),
        }
    if kind == KIND_QUARANTINE:
        return {
            "check": (f"The quarantined rows in {cfg.paths.workspace}/quarantine/dt={run_date}/: the column "
                      "reason says what was wrong with each row and input_file which file it came from (a new "
                      "app release or export format often shows as one file). Fix the source."),
            "more": (f"{report} (volumes: quarantine reasons); after correcting the logs, "
                     f"`tarewise run --date {run_date}` runs the night again."),
            "clears": (f"The next night with at most {d.max_quarantine_share:.2%} of its rows quarantined "
                       f"(drift.max_quarantine_share). A re-run of {run_date} on corrected logs that no longer "
                       "alerts marks this alert withdrawn." + _gate_note(severity, cfg)),
        }
    if kind == KIND_WORSE:
        return {
            "check": ("The same night's other alerts and the held-out ratings behind the comparison: a skew "
                      "shift, low probe coverage or few held-out probe ratings can make the debiased candidate "
                      "look worse than the plain shadow model; then the debiasing settings (debias.*)."),
            "more": ("`tarewise versions` lists each night's MAE of candidate, shadow and live with the gate's "
                     f"decision; `tarewise backfill --start <date> --end {run_date} --sweep "
                     "debias.method=per_user,plain` compares settings on your own history."),
            "clears": (f"The first night the candidate's held-out MAE is within gate.tolerance_mae = "
                       f"{g.tolerance_mae} of the shadow model's." + _gate_note(severity, cfg)),
        }
    return {}
