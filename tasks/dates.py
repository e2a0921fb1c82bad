"""Calendar dates as tarewise uses them: ``YYYY-MM-DD`` strings, one day per partition and per night.

One parser (:func:`parse_date`) says whether a text has the wrong form or names a day that does not
exist, and every window or age computation goes through :func:`shift` so the arithmetic is written once.
"""

from __future__ import annotations

import datetime as dt
import re
from zoneinfo import ZoneInfo

_FORM = re.compile(r"\d{4}-\d{2}-\d{2}")


class DateError(ValueError):
    """A date given by a user or a file is not a calendar date of the form YYYY-MM-DD."""


def parse_date(text: object, what: str = "run date") -> dt.date:
    """``text`` as a date; :class:`DateError` says whether the form or the day is wrong.

    >>> parse_date("2026-11-05")
    datetime.date(2026, 11, 5)
    """
    if not isinstance(text, str) or not _FORM.fullmatch(text):
        raise DateError(f"{what} {text!r} is not of the form YYYY-MM-DD")
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise DateError(f"{what} {text!r} has the right form but is not a calendar date") from None


def shift(day: str, days: int) -> str:
    """The date ``days`` after ``day`` (negative: before), as YYYY-MM-DD."""
    return (dt.date.fromisoformat(day) + dt.timedelta(days=days)).isoformat()


def window_start(run_date: str, days: int) -> str:
    """First date of the ``days``-day window that ends on ``run_date`` (inclusive at both ends)."""
    return shift(run_date, -(days - 1))


def days_between(a: str, b: str) -> int:
    """Whole days from ``a`` to ``b`` (negative when ``b`` is earlier)."""
    return (dt.date.fromisoformat(b) - dt.date.fromisoformat(a)).days


def date_range(start: str, end: str) -> list[str]:
    """Every date from ``start`` to ``end`` inclusive; empty when ``start`` is after ``end``."""
    return [shift(start, k) for k in range(days_between(start, end) + 1)]


def today(timezone: str) -> str:
    """Today's date in ``timezone`` (IANA name)."""
    return dt.datetime.now(ZoneInfo(timezone)).date().isoformat()


def night_before(moment: dt.datetime, timezone: str) -> str:
    """The night a run at ``moment`` processes: the day before, in ``timezone``."""
    return shift(moment.astimezone(ZoneInfo(timezone)).date().isoformat(), -1)


def yesterday(timezone: str) -> str:
    """Yesterday in ``timezone``: the default run date."""
    return night_before(dt.datetime.now(dt.timezone.utc), timezone)
