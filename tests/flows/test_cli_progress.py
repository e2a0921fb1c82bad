"""The backfill progress bar (flows/cli/progress.py): time-left text, and counts read from a real run ledger."""

from __future__ import annotations

import io

import pytest
from rich.console import Console

from flows.cli.progress import LedgerProgress, duration
from tasks.ledger import finish_run, start_run
from tasks.workspace import Workspace


@pytest.mark.parametrize("seconds, text", [(0, "0s"), (41.6, "42s"), (89, "89s"), (89.6, "1m30s"), (90, "1m30s"),
                                           (725, "12m05s"), (5399, "89m59s"), (5400, "1h30m"), (7380, "2h03m")])
def test_duration_switches_unit_at_90_seconds_and_90_minutes(seconds: float, text: str) -> None:
    assert duration(seconds) == text


def _quiet() -> Console:
    return Console(file=io.StringIO(), width=120)


def test_counts_only_this_kind_started_after_the_bar(ws: Workspace) -> None:
    earlier = start_run(ws, "backfill", "2026-10-31")          # before the bar: never counted
    finish_run(ws, earlier, "done")
    bar = LedgerProgress(lambda: [ws], "backfill", 3, "backfill", typical=40.0, out=_quiet())
    assert bar.shown == (0, "backfill", "about 2m00s left (from earlier runs)")   # 3 nights x 40 s

    first = start_run(ws, "backfill", "2026-11-01")
    start_run(ws, "nightly", "2026-11-05")                     # another kind: ignored
    bar.update()
    assert bar.shown == (0, "night 2026-11-01", "about 2m00s left (from earlier runs)")

    finish_run(ws, first, "done")
    second = start_run(ws, "backfill", "2026-11-02")
    bar.update()
    done, description, eta = bar.shown
    assert (done, description) == (1, "night 2026-11-02")
    assert eta.startswith("about ") and eta.endswith(" left") and "earlier runs" not in eta

    finish_run(ws, second, "failed")                           # a failed night is finished too
    third = start_run(ws, "backfill", "2026-11-03")
    finish_run(ws, third, "skipped")
    bar.update()
    assert bar.shown == (3, "done", "finishing")


def test_without_earlier_runs_the_bar_says_it_is_estimating(ws: Workspace) -> None:
    bar = LedgerProgress(lambda: [ws], "sweep", 2, "sweep", typical=None, out=_quiet())
    assert bar.shown == (0, "sweep", "estimating time left")
    bar.update()                                               # no ledger yet: nothing counted, no error
    assert bar.shown == (0, "starting", "estimating time left")


def test_leaving_the_bar_shows_the_final_count_and_sums_several_ledgers(tmp_path) -> None:
    """A sweep polls one ledger per scratch workspace; leaving the ``with`` block reads them once more, so
    the last night is shown even when it finished between two polls."""
    a, b = Workspace.at(tmp_path / "s00"), Workspace.at(tmp_path / "s01")
    with LedgerProgress(lambda: [a, b], "sweep", 2, "sweep", typical=None, out=_quiet()) as bar:
        finish_run(a, start_run(a, "sweep", "2026-11-01"), "done")
        finish_run(b, start_run(b, "sweep", "2026-11-01"), "done")
    assert bar.shown == (2, "done", "finishing")


def test_time_left_is_timed_from_the_first_night_not_from_the_command_start(ws: Workspace) -> None:
    """Prefect's local start-up (about 10 s) comes before the first night; counting it as part of a night
    made the first estimate several times too long."""
    import pandas as pd

    started = pd.Timestamp.now(tz="UTC") - pd.Timedelta(minutes=5)   # the command began five minutes ago
    bar = LedgerProgress(lambda: [ws], "backfill", 2, "backfill", typical=None, out=_quiet(), since=started)
    finish_run(ws, start_run(ws, "backfill", "2026-11-01"), "done")   # the first night itself is quick
    bar.update()
    done, _, eta = bar.shown
    assert done == 1 and eta in ("about 0s left", "about 1s left"), eta   # from the command start: about 5m
