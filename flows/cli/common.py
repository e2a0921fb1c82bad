"""What every command shares: the two consoles, the common flags, loading the config once, Prefect's
quiet local environment, and the one way a failure is reported.

Prefect is imported lazily, after :func:`prefect_env` has set quiet local defaults, so commands that
need no flow (``versions``, ``score``) start fast and never touch ``~/.prefect`` by accident. What a
command checks before that (dates, logs folder, workspace) is in ``preflight.py``.
"""

from __future__ import annotations

import hashlib
import os
import sys
import tempfile
from pathlib import Path
from typing import Literal, Optional

import typer
from rich.console import Console

# Piped output (logs, CI) gets a fixed, wide layout instead of rich's 80-column default.
console = Console(width=None if sys.stdout.isatty() else 140)
err = Console(stderr=True, width=None if sys.stderr.isatty() else 140)

REPO = Path(__file__).resolve().parents[2]
ConfigOpt = typer.Option(None, "--config", "-c", help="TOML config (see configs/example.toml).")
LogsOpt = typer.Option(None, "--logs", help="Logs folder or URI; overrides config and TAREWISE_LOGS.")
WorkspaceOpt = typer.Option(None, "--workspace", help="Workspace folder; overrides config and TAREWISE_WORKSPACE.")
RunnerOpt = typer.Option(None, "--runner", help="Task runner for the parallel parts of a night (overrides "
                         "runtime.runner): a thread pool, or prefect-dask.")
Runner = Optional[Literal["thread", "dask"]]
VerboseOpt = typer.Option(False, "--verbose", "-v", help="Show Prefect's progress lines (log level INFO) and, "
                          "when something fails, the full traceback.")
SharedOpt = typer.Option(None, "--shared", help="Shared copy (pyarrow.fs URI or folder); overrides config and "
                         "TAREWISE_SHARED; '' turns it off.")
DaskAddressOpt = typer.Option(None, "--dask-address", help="Existing Dask scheduler, e.g. tcp://host:8786 "
                              "(overrides runtime.dask_address; implies --runner dask).")


def prefect_home(workspace: str) -> Path:
    """Where Prefect's local state (its temporary server's SQLite database) lives for ``workspace``: a
    folder per workspace in the user's cache (``$XDG_CACHE_HOME`` or ``~/.cache``, else the system's temp
    folder), outside the workspace, so a read-only or full workspace cannot break Prefect's start-up
    and the workspace holds only tarewise's own state."""
    key = hashlib.sha256(str(Path(workspace).expanduser().resolve()).encode()).hexdigest()[:16]
    for cache in (os.environ.get("XDG_CACHE_HOME"), Path.home() / ".cache",
                  Path(tempfile.gettempdir()) / f"tarewise-{os.getuid() if hasattr(os, 'getuid') else 'user'}"):
        if not cache:
            continue
        home = Path(cache) / "tarewise" / "prefect" / key
        try:
            home.mkdir(parents=True, exist_ok=True)
            return home
        except OSError:
            continue
    return Path(tempfile.mkdtemp(prefix="tarewise-prefect-"))


def prefect_env(workspace: str, verbose: bool = False) -> None:
    """Quiet, self-contained Prefect defaults; anything already set in the environment wins."""
    if "PREFECT_HOME" not in os.environ:
        os.environ["PREFECT_HOME"] = str(prefect_home(workspace))
    Path(os.environ["PREFECT_HOME"]).mkdir(parents=True, exist_ok=True)
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "INFO" if verbose else "WARNING")
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("DO_NOT_TRACK", "1")


def load(config: Optional[Path], logs: Optional[str], workspace: Optional[str], shared: Optional[str] = None):
    """The validated config from ``--config`` and the path flags (which win over TAREWISE_* variables).
    Exits 2 with the message on a config error or a workspace on an object store."""
    from tasks.config import ConfigError, load_config
    try:
        cfg = load_config(config, logs=logs, workspace=workspace, shared=shared)
    except ConfigError as exc:
        err.print(f"[bold red]config error[/]: {exc}", markup=True, highlight=False, soft_wrap=True)
        raise typer.Exit(2)
    ws = cfg.paths.workspace
    if "://" in ws and not ws.startswith("file://"):
        # Checked before anything touches the path.
        err.print(f"[bold red]config error[/]: paths.workspace = {ws!r}: the workspace must be a local or "
                  "shared POSIX folder (publishing a version relies on an atomic rename, which object stores "
                  "lack); logs may live on an object store (paths.logs / --logs), and a copy of the store and "
                  "versions too (paths.shared / --shared).", highlight=False, soft_wrap=True)
        raise typer.Exit(2)
    return cfg.with_overrides(workspace=ws.removeprefix("file://")) if ws.startswith("file://") else cfg


def with_runner(cfg, runner: Optional[str], dask_address: Optional[str]):
    """``cfg`` with the command line's task-runner choice applied (validated like the config file)."""
    updates: dict = {}
    if dask_address:
        updates.update({"runtime.runner": "dask", "runtime.dask_address": dask_address})
    if runner:
        if dask_address and runner != "dask":
            err.print("--dask-address needs --runner dask (or no --runner)")
            raise typer.Exit(2)
        updates["runtime.runner"] = runner
    if not updates:
        return cfg
    from tasks.config import ConfigError
    try:
        return cfg.updated(updates)
    except ConfigError as exc:
        err.print(f"[bold red]--runner[/]: {exc}", highlight=False)
        raise typer.Exit(2)


def fail(exc: BaseException, what: str, verbose: bool = False) -> None:
    """Report a failure of ``what`` on stderr and exit 1: one line (the traceback too with ``verbose``)."""
    if verbose:
        err.print_exception()
    err.print(f"[bold red]{what} failed[/]: {type(exc).__name__}: {exc}", highlight=False, soft_wrap=True)
    raise typer.Exit(1)
