"""``tarewise`` command line. The edge: parses flags, validates config once, calls flows and tasks.

The commands live by concern: ``nights.py`` (run, demo, backfill and its sweep), ``read_only.py``
(score, versions, report, status), ``operations.py`` (rollback, approve, reject, prune, share, restore,
serve), ``probe.py`` (probe-budget, probe-plan); what they share is in ``common.py``, the checks made
before anything starts in ``preflight.py``, the printed tables in ``tables.py``, the backfill's progress
bar in ``progress.py``. They are registered here, in the order ``tarewise --help`` lists them.
"""

from __future__ import annotations

import sys

import typer
from typer.core import TyperCommand, TyperGroup

from flows.cli import nights, operations, probe, read_only


def _flags_as_flags(params: list) -> list:
    """Help shows an on/off option as a bare flag (``--dry-run``), not as taking a value (``<bool>``)."""
    for p in params:
        if getattr(p, "is_flag", False) and p.metavar is None:
            p.metavar = ""
    return params


class _Command(TyperCommand):
    def get_params(self, ctx):
        return _flags_as_flags(super().get_params(ctx))


class _Group(TyperGroup):
    def get_params(self, ctx):
        return _flags_as_flags(super().get_params(ctx))

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode: bool = True, **extra):
        """As the library's, except that a usage error (unknown option, missing value, a choice not
        offered) is one line on stderr with where to look, exit 2, like every other user error."""
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        try:
            rv = super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        except typer.Abort:
            print("aborted", file=sys.stderr)
            sys.exit(1)
        except Exception as exc:
            # The command-line library's own usage errors (its exception classes are private to it).
            if not (hasattr(exc, "format_message") and isinstance(getattr(exc, "exit_code", None), int)):
                raise
            if type(exc).__name__ != "NoArgsIsHelpError":   # that one has printed the help already
                ctx = getattr(exc, "ctx", None)
                where = f" (see `{ctx.command_path} --help`)" if ctx is not None else ""
                print(f"error: {' '.join(exc.format_message().split())}{where}", file=sys.stderr)
            sys.exit(exc.exit_code)
        sys.exit(rv if isinstance(rv, int) else 0)


app = typer.Typer(cls=_Group, add_completion=False, no_args_is_help=True,
                  help="Keep a rating model honest against a random probe: nightly runs, versions, reports.")


def _version(value: bool) -> None:
    if value:
        from importlib.metadata import PackageNotFoundError, version
        try:
            typer.echo(f"tarewise {version('tarewise')}")
        except PackageNotFoundError:
            typer.echo("tarewise (not installed: run `pip install -e .` for a version number)")
        raise typer.Exit()


@app.callback()
def _main(show_version: bool = typer.Option(False, "--version", help="Print the version and exit.",
                                            callback=_version, is_eager=True)) -> None:
    """Keep a rating model honest against a random probe: nightly runs, versions, reports."""


for _name, _fn in (("run", nights.run), ("score", read_only.score), ("versions", read_only.versions_cmd),
                   ("report", read_only.report), ("demo", nights.demo), ("backfill", nights.backfill),
                   ("status", read_only.status), ("rollback", operations.rollback), ("approve", operations.approve),
                   ("reject", operations.reject), ("prune", operations.prune),
                   ("share", operations.share), ("restore", operations.restore), ("serve", operations.serve),
                   ("probe-budget", probe.probe_budget), ("probe-plan", probe.probe_plan)):
    app.command(_name, cls=_Command)(_fn)


def main() -> None:  # pragma: no cover - console entry point
    app()
