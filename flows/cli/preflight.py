"""Checks a command makes before anything starts (before Prefect is imported, before a ledger row is
written): a user's mistake costs about a second and one line on stderr, exit code 2.

Each check names what is wrong (the flag, path or config key) and the fix: dates (form or calendar day),
the logs folder (absent or a file, which is not the same as a day without a partition), the workspace
(a file, not writable, too little free space; or, for commands that only read, not there at all).
Input refused here never reaches the run ledger: it was never a night.
"""

from __future__ import annotations

import os
import re
import shlex
import sys
from pathlib import Path
from typing import NoReturn, Optional

import typer

from flows.cli.common import err

#: The demo's folder when ``tarewise demo`` is given none (relative to the current folder).
DEMO_DIR = Path("tarewise-demo")


def user_error(message: str) -> NoReturn:
    """Print ``error: <message>`` as one line on stderr (never wrapped) and exit 2."""
    err.print(f"[bold red]error[/]: {message}", soft_wrap=True, highlight=False, markup=True)
    raise typer.Exit(2)


def check_date(text: str, flag: str, what: str = "run date", known: str = "") -> str:
    """``text`` if it is a YYYY-MM-DD calendar date; else a user error saying whether the form or the day
    is wrong (and, for a form like ``2026/11/05``, the date it probably means), followed by ``known``
    (e.g. which dates exist)."""
    from tasks.dates import DateError, parse_date
    try:
        return parse_date(text, what).isoformat()
    except DateError as exc:
        guess = re.sub(r"[/._ ]", "-", text.strip()) if isinstance(text, str) else ""
        hint = ""
        if guess != text:
            try:
                hint = f"; did you mean {flag} {parse_date(guess).isoformat()}?"
            except DateError:
                pass
        user_error(f"{flag}: {exc}{hint or ' (for example 2026-11-05)'}" + (f"; {known}" if known else ""))


def is_local(path: str) -> bool:
    return "://" not in path or path.startswith("file://")


def check_logs(cfg, run_date: Optional[str] = None) -> None:
    """The logs folder exists and is a folder (local paths and ``file://`` only: a remote store is asked
    by the run itself, whose I/O retries cover a slow network). With ``run_date`` given and
    ``input.missing_partition = "error"``, the day's partition must exist too."""
    logs = cfg.paths.logs
    if not is_local(logs):
        return
    from tasks.ingest.partition import check_logs_folder, list_partition_dates
    from tasks.ingest.errors import IngestError
    try:
        check_logs_folder(logs)
    except IngestError as exc:
        user_error(str(exc))
    if run_date is None or cfg.input.missing_partition != "error":
        return
    base = Path(logs.removeprefix("file://")).expanduser()
    if not (base / f"dt={run_date}").exists():
        user_error(f"no partition for {run_date} in {logs} (dt={run_date} not found); {dates_held(list_partition_dates(logs), 'partitions')}")


def dates_held(dates: list[str], what: str) -> str:
    """``"<what> there: 2026-11-01, 2026-11-02 … 2026-11-12 (13)"``: short, one line, for error messages."""
    if not dates:
        return f"no {what} there yet"
    shown = ", ".join(dates) if len(dates) <= 6 else f"{', '.join(dates[:3])} … {', '.join(dates[-2:])}"
    return f"{what} there: {shown} ({len(dates)})"


def stored_night(date: str | None, stored: list[str], what: str, missing: str, none: str) -> str:
    """The night a read-only command looks at: ``date`` if it is a calendar date among ``stored`` (sorted
    dates; ``what`` names them in the listing), else the newest. A user error otherwise: ``missing``
    (with ``{date}``) when the date is not stored, ``none`` when nothing is."""
    known = dates_held(stored, what)
    if date is not None:
        check_date(date, "--date", "night", known)
        if date not in stored:
            user_error(f"{missing.format(date=date)}; {known}")
    elif not stored:
        user_error(none)
    return date or stored[-1]


def writable_workspace(cfg) -> None:
    """Commands that write: the workspace is a folder (or can be made), writable, with enough free space."""
    from tasks.workspace import WorkspaceError, check_writable
    try:
        check_writable(cfg.paths.workspace, cfg.runtime.min_free_mb)
    except WorkspaceError as exc:
        user_error(str(exc))


def existing_workspace(cfg, config: Optional[Path], workspace_flag: Optional[str]):
    """Commands that only read: the workspace must already exist (nothing is created). Otherwise one line
    saying which paths were tried, where the path came from, and how to point at a workspace."""
    from tasks.workspace import POINT_AT, Workspace, WorkspaceError
    try:
        return Workspace.existing(cfg.paths.workspace)
    except WorkspaceError as exc:
        tried = [f"{Path(cfg.paths.workspace).expanduser().resolve()} ({_origin(config, workspace_flag)})"]
        demo = (DEMO_DIR / "workspace").resolve()
        hint = ""
        if demo.is_dir() and demo != Path(cfg.paths.workspace).expanduser().resolve():
            hint = f"; the demo's workspace is here: --workspace {shown_path(demo)}"
        elif not demo.is_dir():
            tried.append(f"{demo} (the demo's)")
        user_error(f"no workspace found ({str(exc).removeprefix('workspace ')}); tried {', '.join(tried)}; "
                   f"point at one with {POINT_AT} (-c CONFIG){hint}")


def _origin(config: Optional[Path], workspace_flag: Optional[str]) -> str:
    if workspace_flag:
        return "--workspace"
    if os.environ.get("TAREWISE_WORKSPACE"):
        return "TAREWISE_WORKSPACE"
    if config is not None:
        return f"paths.workspace of {config}"
    return "the default paths.workspace, with no -c, --workspace or TAREWISE_WORKSPACE given"


def _shown(path: Path) -> str:
    """``path`` relative to the current folder when it lies inside it (shorter to paste), else absolute.
    Links are kept as they are (a virtual environment's ``bin/python`` is one)."""
    full = Path(os.path.abspath(path))
    for cwd in {Path(os.getcwd()), Path.cwd().resolve()}:
        try:
            return str(full.relative_to(cwd))
        except ValueError:
            continue
    return str(full)


def command_prefix() -> str:
    """How the user started tarewise, for commands printed to paste: the ``tarewise`` script as typed
    (``.venv/bin/tarewise``), else ``python -m flows.cli`` with this interpreter."""
    argv0 = sys.argv[0] if sys.argv else ""
    if Path(argv0).name == "tarewise":
        return shlex.quote(argv0)
    return f"{shown_path(sys.executable)} -m flows.cli"


def shown_path(path: str | Path) -> str:
    """A path as printed in commands to paste: relative inside the current folder, else absolute; quoted
    for a POSIX shell when it needs it."""
    return shlex.quote(_shown(Path(path)))
