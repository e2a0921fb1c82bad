"""A user's mistake costs one line and exit code 2 (flows/cli/preflight.py): every mistake the first-hour
review hit, run through the real command line in a subprocess. None may print a traceback, none may add
a row to the run ledger, and the commands that only read may not create a workspace.

Timing is not asserted (no timed tests); each case refuses before Prefect is imported.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest

from tasks.ledger import finish_run, read_ledger, start_run
from tasks.monitor.metrics_store import write_night_metrics
from tasks.workspace import Workspace

from conftest import REPO

SAMPLE = REPO / "sample_parquet"


def _cli(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if not k.startswith("TAREWISE_")}
    env["PYTHONPATH"] = str(REPO)
    return subprocess.run([sys.executable, "-m", "flows.cli", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=120)


@pytest.fixture(scope="module")
def scene(tmp_path_factory):
    """A folder with an existing workspace (one ledger row, metrics for two nights), a file, and configs
    with a misspelt time zone, a four-field cron, ``missing_partition = "skip"`` and an impossible
    free-space minimum."""
    root = tmp_path_factory.mktemp("mistakes")
    ws = Workspace.at(root / "ws")
    finish_run(ws, start_run(ws, "nightly", "2026-11-01"), "done")
    for d in ("2026-11-01", "2026-11-02"):
        write_night_metrics(ws, {"run_date": d})
    (root / "a-file").write_text("not a folder\n")
    (root / "bad_tz.toml").write_text('[runtime]\ntimezone = "Europe/Berln"\n')
    (root / "bad_cron.toml").write_text('[runtime]\nschedule = "30 2 * *"\n')
    (root / "skip.toml").write_text('[input]\nmissing_partition = "skip"\n')
    (root / "full.toml").write_text("[runtime]\nmin_free_mb = 1000000000000\n")   # an exabyte
    (root / "optout.parquet").write_text("not parquet\n")
    (root / "optout.csv").write_text("name,email\nA,a@example.org\n")
    return root


# (what the case is, arguments, text the one line must contain, text it must not contain)
CASES = [
    ("date in the wrong form", ["run", "--date", "2026/11/05"], ["not of the form YYYY-MM-DD", "2026-11-05"], []),
    ("date that does not exist", ["run", "--date", "2026-11-31"], ["right form but is not a calendar date"], []),
    ("logs folder missing", ["run", "--date", "2026-11-05", "--logs", "{root}/no/such"],
     ["logs folder not found", "no/such"], ["missing_partition", "skip"]),
    ("logs folder missing under skip", ["run", "-c", "{root}/skip.toml", "--date", "2026-11-05", "--logs",
                                        "{root}/no/such"], ["logs folder not found"], ["missing_partition"]),
    ("no partition for that day", ["run", "--date", "2026-12-25", "--logs", str(SAMPLE)],
     ["no partition for 2026-12-25", "partitions there"], ["logs folder not found"]),
    ("misspelt time zone", ["run", "-c", "{root}/bad_tz.toml", "--logs", str(SAMPLE)],
     ["runtime.timezone", "'Europe/Berlin'"], []),
    ("four-field cron", ["run", "-c", "{root}/bad_cron.toml", "--date", "2026-11-05", "--logs", str(SAMPLE)],
     ["runtime.schedule", "5"], []),
    ("workspace is a file", ["run", "--date", "2026-11-05", "--logs", str(SAMPLE), "--workspace", "{root}/a-file"],
     ["is a file, not a folder", "a-file"], []),
    ("too little free space", ["run", "-c", "{root}/full.toml", "--date", "2026-11-05", "--logs", str(SAMPLE)],
     ["MB free", "runtime.min_free_mb"], []),
    ("report date in the wrong form", ["report", "--date", "2026/11/05", "--workspace", "{root}/ws"],
     ["not of the form YYYY-MM-DD", "2026-11-01, 2026-11-02"], []),
    ("report of a night not stored", ["report", "--date", "2026-11-09", "--workspace", "{root}/ws"],
     ["no metrics stored for 2026-11-09", "2026-11-01, 2026-11-02"], []),
    ("backfill date in the wrong form", ["backfill", "--start", "2026/11/01", "--end", "2026-11-03", "--logs",
                                         str(SAMPLE)], ["--start", "not of the form YYYY-MM-DD"], []),
    ("backfill range backwards", ["backfill", "--start", "2026-11-03", "--end", "2026-11-01", "--logs", str(SAMPLE)],
     ["is after --end"], []),
    ("backfill --live not offered", ["backfill", "--start", "2026-11-01", "--end", "2026-11-03", "--live",
                                     "sometimes"], ["--live", "'last', 'each'"], []),
    ("prune date that does not exist", ["prune", "--as-of", "2026-02-30"], ["--as-of", "not a calendar date"], []),
    ("demo with no nights", ["demo", "--nights", "0"], ["--nights"], []),
    ("misspelt option", ["run", "--dtae", "2026-11-01"], ["--dtae", "--date"], []),
    ("approve a version that is not there", ["approve", "v20261105-1"],
     ["cannot approve v20261105-1", "is not a published version", "awaiting approval: none"], []),
    ("reject a version that is not there", ["reject", "v20261105-1", "--reason", "x"],
     ["cannot reject v20261105-1", "awaiting approval: none"], []),
    ("probe-budget date in the wrong form", ["probe-budget", "--date", "2026/11/05"],
     ["--date", "not of the form YYYY-MM-DD"], []),
    ("probe-budget of a night without a version", ["probe-budget", "--date", "2026-11-02"],
     ["no version published for 2026-11-02"], []),
    ("probe-plan with a budget of 0", ["probe-plan", "--budget", "0", "--date", "2026-11-13"], ["--budget"], []),
    ("probe-plan opt-out list missing", ["probe-plan", "--budget", "5", "--date", "2026-11-13", "--opt-out",
                                         "{root}/nope.csv"], ["--opt-out", "no file", "nope.csv"], []),
    ("probe-plan opt-out list unreadable", ["probe-plan", "--budget", "5", "--date", "2026-11-13", "--opt-out",
                                            "{root}/optout.parquet"], ["--opt-out", "cannot be read as Parquet"], []),
    ("probe-plan opt-out list without ids", ["probe-plan", "--budget", "5", "--date", "2026-11-13", "--opt-out",
                                             "{root}/optout.csv"], ["--opt-out", "no member_id column"], []),
    ("probe-plan --out in a missing folder", ["probe-plan", "--budget", "5", "--date", "2026-11-13", "--out",
                                              "{root}/no/such/plan.parquet"], ["--out", "does not exist"], []),
    ("probe-plan with no live version", ["probe-plan", "--budget", "5", "--date", "2026-11-13"],
     ["no live version", "run a night first"], []),
]

# Commands that only read, pointed at nothing: they say what they tried and create nothing.
READ_ONLY = [
    ("status without a workspace", ["status"], ".tarewise"),
    ("versions at a missing path", ["versions", "--workspace", "{root}/nowhere"], "nowhere"),
    ("report without a workspace", ["report"], ".tarewise"),
    ("score without a workspace", ["score", "--pairs", "p.parquet", "--out", "o.parquet"], ".tarewise"),
    ("probe-budget without a workspace", ["probe-budget"], ".tarewise"),
    ("probe-plan without a workspace", ["probe-plan", "--budget", "5", "--date", "2026-11-13"], ".tarewise"),
]


def _one_line_refusal(out: subprocess.CompletedProcess, what: str) -> str:
    assert out.returncode == 2, f"{what}: exit {out.returncode}\n{out.stderr[-2000:]}"
    assert "Traceback" not in out.stderr + out.stdout, f"{what}: {out.stderr[-2000:]}"
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1, f"{what}: {len(lines)} lines on stderr:\n{out.stderr}"
    return lines[0]


def _cli_all(arg_lists: list[list[str]], cwd: Path) -> list[subprocess.CompletedProcess]:
    """Every command line at once (independent refusals; a few processes at a time keep the 2-core CI
    busy while each one starts Python), results in the given order."""
    with ThreadPoolExecutor(max_workers=4) as pool:
        return list(pool.map(lambda args: _cli(args, cwd), arg_lists))


def test_every_user_error_is_one_line_exit_2_and_no_ledger_row(scene: Path) -> None:
    ws = Workspace.at(scene / "ws")
    rows_before = len(read_ledger(ws))
    arg_lists = []
    for _what, args, _must, _must_not in CASES:
        args = [a.format(root=scene) for a in args]
        if "--workspace" not in args and args[0] != "demo":
            args += ["--workspace", str(scene / "ws")]
        arg_lists.append(args)
    for (what, _args, must, must_not), out in zip(CASES, _cli_all(arg_lists, scene)):
        line = _one_line_refusal(out, what)
        for text in must:
            assert text in line, f"{what}: {text!r} not in {line!r}"
        for text in must_not:
            assert text not in line, f"{what}: {text!r} in {line!r}"
    assert len(read_ledger(ws)) == rows_before, "input refused before a run started must not be a night"
    assert not (scene / "ws" / ".prefect-home").exists()


def test_read_only_commands_create_no_workspace_and_say_what_they_tried(tmp_path: Path) -> None:
    outs = _cli_all([[a.format(root=tmp_path) for a in args] for _what, args, _tried in READ_ONLY], tmp_path)
    for (what, _args, tried), out in zip(READ_ONLY, outs):
        line = _one_line_refusal(out, what)
        assert "no workspace found" in line and tried in line and "--workspace DIR" in line, line
        assert "tarewise-demo" in line, line                   # the demo's default place is tried too
    assert sorted(p.name for p in tmp_path.iterdir()) == [], "a read-only command created something"


def _unwritable_folder() -> tuple[Path, callable]:
    """A folder nobody (this process included) can create files in, and how to undo that. As a normal
    user, permission bits do it; root ignores them, so as root the folder is marked immutable
    (``chattr +i``, which binds root too); where neither works the test is skipped with the reason."""
    base = Path(tempfile.mkdtemp(prefix="tarewise-ro-"))
    if os.geteuid() != 0:
        base.chmod(0o555)
        return base, lambda: (base.chmod(0o755), shutil.rmtree(base))
    chattr = shutil.which("chattr")
    if chattr and subprocess.run([chattr, "+i", str(base)], capture_output=True).returncode == 0:
        return base, lambda: (subprocess.run([chattr, "-i", str(base)]), shutil.rmtree(base))
    shutil.rmtree(base)
    pytest.skip("running as root, which writes whatever the permission bits say, and this filesystem does not "
                "take the immutable attribute (chattr +i); a read-only workspace cannot be made here")


def test_unwritable_workspace_is_named_in_one_line(scene: Path) -> None:
    folder, undo = _unwritable_folder()
    try:
        for where in (folder, folder / "ws"):                  # the workspace itself, or where it would be made
            line = _one_line_refusal(_cli(["run", "--date", "2026-11-05", "--logs", str(SAMPLE), "--workspace",
                                           str(where)], scene), f"unwritable {where}")
            assert "is not writable" in line and str(where) in line, line
        assert not (folder / "ws").exists()
    finally:
        undo()


def test_prefect_state_lives_outside_the_workspace(tmp_path: Path, monkeypatch) -> None:
    """A read-only or full workspace must not break Prefect's start-up: its home is in the user's cache,
    one per workspace, the same one on every run."""
    from flows.cli.common import prefect_home

    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    a, b = prefect_home(str(tmp_path / "ws-a")), prefect_home(str(tmp_path / "ws-b"))
    assert a.is_dir() and b.is_dir() and a != b and a == prefect_home(str(tmp_path / "ws-a"))
    assert (tmp_path / "cache" / "tarewise" / "prefect") in a.parents
    assert not (tmp_path / "ws-a").exists() and not (tmp_path / "ws-b").exists()


def test_a_flow_started_with_a_bad_date_records_no_night(prefect_harness, tmp_path: Path) -> None:
    """The same rule off the command line (a deployment run with a mistyped parameter): the nightly flow
    refuses the date before it writes a ledger row or creates the workspace."""
    from flows.nightly import nightly
    from tasks.config import load_config
    from tasks.dates import DateError

    cfg = load_config(REPO / "configs" / "demo.toml", logs=str(SAMPLE), workspace=str(tmp_path / "ws"))
    with pytest.raises(DateError, match="not of the form YYYY-MM-DD"):
        nightly(cfg=cfg, run_date="2026/11/05")
    assert not (tmp_path / "ws").exists()
