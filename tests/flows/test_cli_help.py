"""What `--help` shows (flags as flags, repeatable options as repeatable, the choices of --live and
--runner, a help text for --verbose, no "[default: 0]"), `--version`, and `backfill --dry-run` saying how
far a backfill really gets. No flow runs here."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from flows.cli import app

COMMANDS = ["run", "score", "versions", "report", "demo", "backfill", "status", "rollback", "approve", "reject",
            "prune", "share", "restore", "serve", "probe-budget", "probe-plan"]


def _help(*args: str) -> str:
    result = CliRunner(env={"COLUMNS": "200"}).invoke(app, [*args, "--help"])
    assert result.exit_code == 0, result.output
    return result.output


@pytest.mark.parametrize("command", COMMANDS)
def test_flags_show_as_flags_and_defaults_read_as_words(command: str) -> None:
    text = _help(command)
    assert "<bool>" not in text and "[default: 0]" not in text and "<list" not in text
    assert "--workspace" in text                                   # every command takes it, demo included
    if "--verbose" in text:
        verbose = next(line for line in text.splitlines() if "--verbose" in line)
        assert "traceback" in verbose


def test_choices_and_repeatable_options_are_listed() -> None:
    backfill = _help("backfill")
    assert "<last|each>" in backfill and "<thread|dask>" in backfill and "(repeatable)" in backfill
    assert "--dry-run   " in backfill.replace("│", " ")                 # no value after the flag
    assert "every night in the sample" in _help("demo")


def test_version_prints_the_package_version() -> None:
    result = CliRunner().invoke(app, ["--version"])
    assert result.exit_code == 0 and result.output.startswith("tarewise ")


def test_dry_run_says_where_a_missing_day_stops_the_backfill_and_creates_nothing(tmp_path: Path) -> None:
    from tasks.operate.demo_data import generate

    generate(tmp_path / "logs", "2026-11-01", 5, n_members=40, n_titles=30, organic_per_day=60, seed=3)
    shutil.rmtree(tmp_path / "logs" / "dt=2026-11-03")
    result = CliRunner().invoke(app, ["backfill", "--start", "2026-11-01", "--end", "2026-11-05", "--dry-run",
                                      "--logs", str(tmp_path / "logs"), "--workspace", str(tmp_path / "ws")])
    assert result.exit_code == 0, result.output
    text = " ".join(result.output.split())
    assert "5 to run, 0 to skip" in text
    assert "it stops at 2026-11-03 (no partition): 2 night(s) run before it, 2 after it are not reached" in text
    assert not (tmp_path / "ws").exists()

    # Without --dry-run the same plan is refused in one line before any night runs (nothing half done).
    result = CliRunner().invoke(app, ["backfill", "--start", "2026-11-01", "--end", "2026-11-05",
                                      "--logs", str(tmp_path / "logs"), "--workspace", str(tmp_path / "ws")])
    assert result.exit_code == 2, result.output
    lines = [ln for ln in result.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and "no dt=2026-11-03 partition" in lines[0] and "after 2 night(s)" in lines[0], lines
    assert not (tmp_path / "ws" / "versions").exists() or not any((tmp_path / "ws" / "versions").iterdir())
