"""The config schema checks the time zone and the cron schedule (tasks/config/operations.py) so a typo is caught
when the config is read, not at run time. References: the IANA tz database through Python's
``zoneinfo`` (with the ``tzdata`` package), and ``prefect.schedules.Cron``, which must accept every
schedule the schema accepts."""

from __future__ import annotations

import pytest

from tasks.config import Config, ConfigError, parse_config


@pytest.mark.parametrize("zone", ["UTC", "Europe/Berlin", "America/Chicago", "Asia/Kolkata", "Etc/GMT+5"])
def test_iana_zones_are_accepted(zone: str) -> None:
    assert parse_config({"runtime": {"timezone": zone}}).runtime.timezone == zone


@pytest.mark.parametrize("zone, hint", [("Europe/Berln", "'Europe/Berlin'"), ("europe/berlin", "'Europe/Berlin'"),
                                        ("Mars/Olympus_Mons", "e.g. 'Europe/Berlin'"), ("", "e.g."),
                                        ("Europe", "did you mean 'Europe/"), ("../../etc/passwd", "e.g.")])
def test_a_wrong_zone_is_one_line_naming_the_key_and_a_fix(zone: str, hint: str) -> None:
    with pytest.raises(ConfigError) as info:
        parse_config({"runtime": {"timezone": zone}}, source="night.toml")
    text = str(info.value)
    assert text.startswith("invalid config in night.toml: runtime.timezone:") and "\n" not in text
    assert "not an IANA time zone name" in text and hint in text


@pytest.mark.parametrize("expr", ["30 2 * * *", "15 3 * * 1-5", "*/10 0-6 1,15 * *", "0 4 * * MON"])
def test_five_field_cron_is_accepted_and_prefect_agrees(expr: str) -> None:
    from prefect.schedules import Cron

    cfg = parse_config({"runtime": {"schedule": expr, "timezone": "Europe/Berlin"}})
    Cron(cfg.runtime.schedule, timezone=cfg.runtime.timezone)     # raises if Prefect disagreed


@pytest.mark.parametrize("expr, says", [("30 2 * *", "has 4 field(s)"), ("30 2 * * * *", "has 6 field(s)"),
                                        ("@daily", "has 1 field(s)"), ("61 2 * * *", "Bad minute"),
                                        ("30 25 * * *", "Bad hour"), ("0 0 31 2 *", "Bad day-of-month")])
def test_a_wrong_cron_is_one_line_naming_the_key(expr: str, says: str) -> None:
    with pytest.raises(ConfigError) as info:
        Config().updated({"runtime.schedule": expr})
    text = str(info.value)
    assert "runtime.schedule" in text and says in text and "'30 2 * * *'" in text and "\n" not in text


def test_several_problems_are_listed_one_per_line() -> None:
    with pytest.raises(ConfigError) as info:
        parse_config({"runtime": {"timezone": "Nowhere", "schedule": "x"}, "model": {"dimm": 3}}, source="a.toml")
    lines = str(info.value).splitlines()
    assert lines[0] == "invalid config in a.toml:" and len(lines) == 4
    assert any("model.dimm: unknown key" in line for line in lines)
