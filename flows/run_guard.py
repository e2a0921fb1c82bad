"""What every top-level run (a nightly, a backfill) does around its work, so the ledger and Prefect agree.

- **The lock, waited for.** :func:`locked_run` waits up to ``runtime.lock_wait_seconds`` for another run
  to release the workspace lock (a nightly and a backfill queue behind each other instead of failing). If
  the wait runs out it raises :class:`~tasks.lock.LockWaitExpired` with one line, and that line lands in
  the ledger as a ``refused`` row (with this run's Prefect flow run id).
- **Dead runs named.** Holding the lock, :func:`settle_dead_runs` marks the ledger rows of runs that died
  (SIGKILL, power loss) ``interrupted`` with the stage they were in, and marks their Prefect flow runs
  ``Crashed`` through the Prefect API (when it is reachable; the log and the ledger message say when not).
- **Signals recorded.** :func:`stop_signals` installs SIGTERM/SIGINT handlers that write what stopped the
  run into the night's record (signal, stage, last finished step) and then hand the signal on (Prefect
  turns SIGTERM into ``TerminationSignal``, Python SIGINT into ``KeyboardInterrupt``), so the ledger never
  says ``SystemExit: 1``. A signal arriving after the night was recorded ``done`` is held back until the
  run has finished its remaining bookkeeping: a published night is never turned into Cancelled.
- **Operational alerts** (an empty day, missed nights) go through the same history and receivers as the
  night's metric alerts (:func:`send_alert`).
"""

from __future__ import annotations

import os
import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager

from tasks import ledger
from tasks.config import Config
from tasks.ledger import RunRecord
from tasks.lock import LockHeld, workspace_lock
from tasks.workspace import Workspace

_watched: list[RunRecord] = []
_held_back: list[int] = []


def flow_run_id() -> str | None:
    """The current Prefect flow run's id, or None outside a flow run."""
    from prefect.runtime import flow_run
    value = flow_run.id
    return str(value) if value else None


def watch(record: RunRecord) -> None:
    """The record a signal should be written into (the night now running)."""
    _watched[:] = [record]


def stop_requested() -> str | None:
    """The name of a signal held back after a night was done (a backfill stops before its next night)."""
    return signal.Signals(_held_back[0]).name if _held_back else None


@contextmanager
def stop_signals(log) -> Iterator[None]:
    """SIGTERM/SIGINT handlers for the block (main thread only; elsewhere a no-op). See module docstring."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {s: signal.getsignal(s) for s in (signal.SIGTERM, signal.SIGINT)}

    def handler(signum, frame):
        name = signal.Signals(signum).name
        record = _watched[0] if _watched else None
        if record is not None and record.status == "done":
            if not _held_back:
                _held_back.append(signum)
            log.warning("%s received after night %s was recorded done (version %s, %s); finishing its "
                        "bookkeeping first", name, record.run_date, record.version_id, record.state)
            return
        if record is not None and record.status == "running":
            record.interrupt(f"stopped by {name}")
        prev = previous[signum]
        if callable(prev):
            prev(signum, frame)
        elif signum == signal.SIGINT:
            raise KeyboardInterrupt
        else:   # the default action: end the process with the signal
            signal.signal(signum, signal.SIG_DFL)
            os.kill(os.getpid(), signum)

    for s in previous:
        signal.signal(s, handler)
    _held_back.clear()
    try:
        yield
    finally:
        for s, h in previous.items():
            signal.signal(s, h)
        _watched.clear()


@contextmanager
def locked_run(cfg: Config, ws: Workspace, what: str, kind: str, run_date: str) -> Iterator[dict]:
    """The workspace lock for a top-level run, waiting up to ``runtime.lock_wait_seconds``; see module docstring."""
    from prefect import get_run_logger
    log = get_run_logger()
    try:
        with workspace_lock(ws.lock, what, cfg.runtime.lock_stale_seconds, cfg.runtime.lock_wait_seconds) as held:
            if held["waited"] >= 1:
                log.warning("waited %.0f s for the workspace lock", held["waited"])
            if held["took_over"]:
                log.warning("took over a stale workspace lock left by %s", held["took_over"].get("what"))
            settle_dead_runs(ws, log)
            yield held
    except LockHeld as exc:   # LockWaitExpired after a wait; LockHeld at once with lock_wait_seconds = 0
        ledger.record_refusal(ws, kind, run_date, f"{what}: {exc}", flow_run_id=flow_run_id())
        raise


def settle_dead_runs(ws: Workspace, log) -> list[dict]:
    """Ledger rows of dead runs -> ``interrupted`` (naming their stage); their Prefect flow runs -> Crashed."""
    dead = ledger.settle_dead_runs(ws)
    for row in dead:
        note = mark_crashed(row["flow_run_id"], f"tarewise: {row['kind']} run for {row['run_date']} "
                                                f"{row['message']}")
        log.warning("%s run %s for %s never finished: %s; %s", row["kind"], row["run_id"], row["run_date"],
                    row["message"], note)
        row["prefect"] = note
    return dead


def mark_crashed(flow_run_id: str | None, message: str) -> str:
    """Set a dead run's Prefect flow run to Crashed unless it is already final; returns what happened."""
    if not flow_run_id:
        return "no Prefect flow run recorded"
    try:
        from prefect.client.orchestration import get_client
        from prefect.states import Crashed
        with get_client(sync_client=True) as client:
            run = client.read_flow_run(flow_run_id)
            if run.state is not None and run.state.is_final():
                return f"Prefect flow run {flow_run_id} already {run.state.name}"
            client.set_flow_run_state(flow_run_id, Crashed(message=message[:500]), force=True)
        return f"Prefect flow run {flow_run_id} marked Crashed"
    except Exception as exc:  # noqa: BLE001 - the ledger is settled either way; say why Prefect is not
        return f"Prefect flow run {flow_run_id} NOT marked Crashed (Prefect API not reachable: {type(exc).__name__})"


def send_alert(cfg: Config, ws: Workspace, kind: str, run_date: str, explanation: str, run_kind: str,
               severity: str = "warning", metric: str = "", value: float = 0.0) -> None:
    """Record and deliver one operational alert (``alert_id`` ``<kind>-<run_date>``) like a night's alerts."""
    from flows.alert_channels import prefect_channels
    from tasks.monitor.alert_delivery import deliver_alerts
    from tasks.monitor.alert_history import AlertHistory
    from tasks.monitor.alert_rules import Alert
    alert = Alert(kind=kind, severity=severity, metric=metric or kind, value=value, band=(None, None),
                  explanation=explanation, run_date=run_date, alert_id=f"{kind}-{run_date}", first_date=run_date,
                  last_date=run_date)
    send = run_kind == "nightly" or cfg.alerts.backfill_delivery == "send"
    deliver_alerts(AlertHistory.read(ws), [alert], cfg, prefect_channels(cfg), send=send)
