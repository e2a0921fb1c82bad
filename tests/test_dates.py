"""One date parser and the window arithmetic every stage uses (tasks/dates.py)."""

from __future__ import annotations

import datetime as dt

import pytest

from tasks.dates import (DateError, date_range, days_between, night_before, parse_date, shift, today,
                         window_start, yesterday)


@pytest.mark.parametrize("text", ["2026/11/05", "2026-11-5", "26-11-05", " 2026-11-05", "2026-11-05T00:00",
                                  "", None, 20261105])
def test_a_wrong_form_says_so(text) -> None:
    with pytest.raises(DateError, match="not of the form YYYY-MM-DD"):
        parse_date(text, "--date")


@pytest.mark.parametrize("text", ["2026-11-31", "2026-02-29", "2026-13-01", "2026-00-10"])
def test_the_right_form_on_a_day_that_does_not_exist_says_so(text) -> None:
    with pytest.raises(DateError, match="right form but is not a calendar date"):
        parse_date(text)


def test_a_leap_day_is_a_day_and_what_names_the_input() -> None:
    assert parse_date("2028-02-29") == dt.date(2028, 2, 29)
    with pytest.raises(DateError, match=r"^--start '2026/1/1'"):
        parse_date("2026/1/1", "--start")


def test_windows_are_inclusive_at_both_ends() -> None:
    # A 30-day window ending on 2026-11-30 starts on 2026-11-01: 30 dates counted both ends.
    assert window_start("2026-11-30", 30) == "2026-11-01"
    assert len(date_range(window_start("2026-11-30", 30), "2026-11-30")) == 30
    assert window_start("2026-11-30", 1) == "2026-11-30"


def test_shift_range_and_distance_agree_across_month_and_year_ends() -> None:
    assert shift("2026-12-31", 1) == "2027-01-01"
    assert shift("2026-03-01", -1) == "2026-02-28"
    assert days_between("2026-12-30", "2027-01-02") == 3 == -days_between("2027-01-02", "2026-12-30")
    assert date_range("2026-12-30", "2027-01-02") == ["2026-12-30", "2026-12-31", "2027-01-01", "2027-01-02"]
    assert date_range("2026-11-02", "2026-11-01") == []


def test_the_night_a_run_processes_is_the_day_before_in_its_zone() -> None:
    # 00:30 UTC on 29 March is 01:30 in Berlin (still winter time): the night is 28 March there, and in
    # UTC too; at 23:30 UTC on 28 March it is already the 29th in Berlin.
    early = dt.datetime(2026, 3, 29, 0, 30, tzinfo=dt.timezone.utc)
    late = dt.datetime(2026, 3, 28, 23, 30, tzinfo=dt.timezone.utc)
    assert night_before(early, "Europe/Berlin") == "2026-03-28" == night_before(early, "UTC")
    assert night_before(late, "Europe/Berlin") == "2026-03-28"
    assert night_before(late, "UTC") == "2026-03-27"


def test_yesterday_is_the_day_before_today_in_the_zone() -> None:
    for zone in ("UTC", "Pacific/Kiritimati", "Pacific/Pago_Pago"):   # UTC+14 and UTC-11: a day apart
        before, y, after = today(zone), yesterday(zone), today(zone)   # midnight may pass in between
        assert shift(y, 1) in (before, after)
    assert days_between(yesterday("Pacific/Pago_Pago"), yesterday("Pacific/Kiritimati")) in (1, 2)
