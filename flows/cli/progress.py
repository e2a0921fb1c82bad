"""A progress bar for long runs (backfill, sweep), fed by the run ledger while the flow runs.

The flow runs in the main thread; a background thread polls the ledgers every half second. The ledger is
what the flow records anyway, so the flow needs no UI hook and the bar shows exactly what is recorded.
"""

from __future__ import annotations

from typing import Callable, Optional

from rich.console import Console

from flows.cli.common import console


class LedgerProgress:
    """A rich progress bar counting finished runs of one ``kind`` in the ledgers ``ledgers()`` returns
    (workspaces; called on every poll, since a sweep's scratch workspaces appear while it runs). Only runs
    started after the bar was made count. Time left = remaining nights x mean seconds per finished night,
    timed from the start of the first night (so Prefect's start-up, about 10 s, is not counted as part of
    a night); before the first finishes: ``typical``, the median duration of earlier runs in the
    workspace, marked "from earlier runs")."""

    def __init__(self, ledgers: Callable[[], list], kind: str, total: int, title: str, typical: Optional[float],
                 out: Console = console, since=None) -> None:
        import threading

        import pandas as pd
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress, SpinnerColumn, TextColumn,
                                   TimeElapsedColumn)
        self._ledgers, self._kind, self._total, self._typical = ledgers, kind, total, typical
        # Runs started from here on count (``since``: a UTC timestamp, default now).
        self._t0 = pd.Timestamp.now(tz="UTC") if since is None else pd.Timestamp(since)
        self._stop = threading.Event()
        self._progress = Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(),
                                  MofNCompleteColumn(), TimeElapsedColumn(), TextColumn("{task.fields[eta]}"),
                                  console=out, transient=False)
        first = f"about {duration(typical * total)} left (from earlier runs)" if typical else "estimating time left"
        self._task = self._progress.add_task(title, total=total, eta=first)
        self._thread = threading.Thread(target=self._poll, daemon=True)

    def __enter__(self):
        self._progress.__enter__()
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join(timeout=5)
        self.update()
        self._progress.__exit__(*exc)

    def _poll(self) -> None:
        while not self._stop.wait(0.5):
            try:
                self.update()
            except Exception:  # noqa: BLE001 - a torn read of a ledger must not kill the bar
                pass

    def update(self) -> None:
        """Read the ledgers once and move the bar (the poller calls this every half second)."""
        import pandas as pd
        from tasks.ledger import read_ledger
        finished, current, first_start = 0, "", None
        for ws in self._ledgers():
            df = read_ledger(ws)
            df = df[(df["kind"] == self._kind) & (df["started_at"] >= self._t0)]
            finished += int(df["status"].isin(["done", "skipped", "failed"]).sum())
            running = df[df["status"] == "running"]
            if len(running):
                current = str(running["run_date"].iloc[-1])
            if len(df):
                started = pd.Timestamp(df["started_at"].min())
                first_start = started if first_start is None else min(first_start, started)
        # Timed from the first night's start: what came before it (Prefect's start-up) is not a night.
        elapsed = (pd.Timestamp.now(tz="UTC") - (first_start or self._t0)).total_seconds()
        left = self._total - finished
        if finished:
            eta = f"about {duration(elapsed / finished * left)} left" if left else "finishing"
        else:
            eta = self._progress.tasks[0].fields["eta"]
        self._progress.update(self._task, completed=min(finished, self._total), eta=eta,
                              description=f"night {current}" if current else
                              ("done" if finished >= self._total else "starting"))

    @property
    def shown(self) -> tuple[int, str, str]:
        """(runs counted as finished, description, time-left text) as the bar shows them now."""
        task = self._progress.tasks[0]
        return int(task.completed), task.description, task.fields["eta"]


def duration(seconds: float) -> str:
    """Seconds as a short text, rounded to the second: ``42s``, ``12m05s`` (from 90 s), ``2h03m`` (from 90 min)."""
    seconds = int(round(seconds))
    if seconds < 90:
        return f"{seconds}s"
    if seconds < 5400:
        return f"{seconds // 60}m{seconds % 60:02d}s"
    return f"{seconds // 3600}h{(seconds % 3600) // 60:02d}m"
