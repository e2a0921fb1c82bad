"""``tarewise`` command line. The edge: parses flags, validates config once, calls flows and tasks.

The commands live by concern: ``nights.py`` (run, demo, backfill and its sweep), ``read_only.py``
(score, versions, report, status), ``operations.py`` (rollback, prune, share, restore, serve); what they
share is in ``common.py``, the printed tables in ``tables.py``, the backfill's progress bar in
``progress.py``. They are registered here, in the order ``tarewise --help`` lists them.
"""

from __future__ import annotations

import typer

from flows.cli import nights, operations, read_only

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Keep a rating model honest against a random probe: nightly runs, versions, reports.")

app.command()(nights.run)
app.command()(read_only.score)
app.command("versions")(read_only.versions_cmd)
app.command()(read_only.report)
app.command()(nights.demo)
app.command()(nights.backfill)
app.command()(read_only.status)
app.command()(operations.rollback)
app.command()(operations.prune)
app.command()(operations.share)
app.command()(operations.restore)
app.command()(operations.serve)


def main() -> None:  # pragma: no cover - console entry point
    app()
