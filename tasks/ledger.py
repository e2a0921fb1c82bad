"""The run ledger: every nightly, backfill, rollback or sweep run with status, version, counts, durations.

Stored as one small Parquet file (schemas.LEDGER), rewritten atomically on each update: runs are few
(one or two a day), so read-modify-write is simpler and safer than appends.

A run records itself with :func:`recorded`: the row is started on entry, the run fills in a
:class:`RunRecord` (stage timings with ``record.stage(...)``, counts, version) and the row is finished
exactly once on exit: ``done``, ``skipped`` (when the run said so), ``interrupted`` when a signal
(SIGTERM, SIGINT) or an exit request stopped it (naming the signal, the stage and the last finished step),
or ``failed`` with the exception. While it runs, the row keeps the stage it is in (``stage``), so a run
killed outright (SIGKILL) is recorded by the next run as crashed in that stage (:func:`mark_interrupted`).

Each row also keeps the Prefect flow run that ran it (``flow_run_id``) and the night's ``inputs_key``
(the day's input files' checksums and the config digest), which makes a trigger for a night already done
with the same inputs a no-op. Every read-modify-write holds a short ``flock`` on ``ledger/runs.lock``,
so a run waiting for the workspace lock may record that it gave up without losing another run's update.
"""

from __future__ import annotations

import fcntl
import json
import os
import signal
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import TypeVar

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from tasks.schemas import LEDGER
from tasks.files import atomic_write_bytes
from tasks.workspace import Workspace


def read_ledger(ws: Workspace) -> pd.DataFrame:
    if not ws.ledger.exists():
        return LEDGER.empty_table().to_pandas()
    df = pq.read_table(ws.ledger).to_pandas()
    for name in LEDGER.names:   # a ledger written before a column existed
        if name not in df.columns:
            df[name] = None
    return df[LEDGER.names]


@contextmanager
def _updating(ws: Workspace) -> Iterator[None]:
    """Hold ``ledger/runs.lock`` (``flock``, released when the process dies) for one read-modify-write."""
    ws.ledger.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(ws.ledger.parent / "runs.lock", os.O_CREAT | os.O_RDWR, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)


def _write(ws: Workspace, df: pd.DataFrame) -> None:
    table = pa.Table.from_pandas(df, schema=LEDGER, preserve_index=False)
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink)
    atomic_write_bytes(ws.ledger, sink.getvalue().to_pybytes())


def _now() -> pd.Timestamp:
    return pd.Timestamp(datetime.now(timezone.utc))


def start_run(ws: Workspace, kind: str, run_date: str, message: str = "", *, flow_run_id: str | None = None,
              inputs_key: str | None = None, status: str = "running") -> str:
    run_id = uuid.uuid4().hex[:12]
    row = {c: None for c in LEDGER.names}
    row.update(run_id=run_id, kind=kind, run_date=run_date, status=status, started_at=_now(), message=message,
               flow_run_id=flow_run_id, inputs_key=inputs_key)
    if status != "running":
        row["finished_at"] = row["started_at"]
    with _updating(ws):
        df = read_ledger(ws)
        _write(ws, pd.concat([df, pd.DataFrame([row])], ignore_index=True) if len(df) else pd.DataFrame([row]))
    return run_id


def _update(ws: Workspace, run_id: str, updates: dict) -> None:
    with _updating(ws):
        df = read_ledger(ws)
        hit = df["run_id"] == run_id
        if not hit.any():
            raise KeyError(f"run {run_id} not in ledger {ws.ledger}")
        for k, v in updates.items():
            df[k] = df[k].astype(object)
            df.loc[hit, k] = v
        _write(ws, df)


def finish_run(ws: Workspace, run_id: str, status: str, *, version_id: str | None = None, state: str | None = None,
               rows_ingested: int | None = None, rows_quarantined: int | None = None,
               durations: dict | None = None, message: str = "", **more) -> None:
    """Finish a row; ``more``: other ledger columns to set (``stage``, ``inputs_key``, ``flow_run_id``)."""
    _update(ws, run_id, {"status": status, "version_id": version_id, "state": state, "rows_ingested": rows_ingested,
                         "rows_quarantined": rows_quarantined, "finished_at": _now(),
                         "durations_json": json.dumps(durations or {}, sort_keys=True), "message": message, **more})


def set_stage(ws: Workspace, run_id: str, stage: str, durations: dict | None = None) -> None:
    """A running row enters ``stage`` (with the durations so far): what the next run reports if this one dies."""
    _update(ws, run_id, {"stage": stage, "durations_json": json.dumps(durations or {}, sort_keys=True)})


def record_refusal(ws: Workspace, kind: str, run_date: str, message: str, flow_run_id: str | None = None) -> str:
    """A run that never started its work (e.g. the workspace lock stayed held past ``runtime.lock_wait_seconds``):
    one finished row with status ``refused``. :func:`latest_by_date` ignores such rows (they changed nothing)."""
    return start_run(ws, kind, run_date, message, flow_run_id=flow_run_id, status="refused")


def latest_by_date(ws: Workspace, kinds: tuple[str, ...] = ("nightly", "backfill")) -> pd.DataFrame:
    """The latest run (by start time) of these kinds for each run date, indexed by ``run_date``."""
    df = read_ledger(ws)
    df = df[df["kind"].isin(kinds) & (df["status"] != "refused")]
    if df.empty:
        return df.set_index("run_date")
    return df.sort_values("started_at", kind="stable").groupby("run_date").tail(1).set_index("run_date").sort_index()


def latest_done(ws: Workspace, run_date: str, kinds: tuple[str, ...] = ("nightly", "backfill")) -> dict | None:
    """The latest ``done`` run of ``run_date`` (a dict of its ledger row), or None."""
    df = read_ledger(ws)
    df = df[df["kind"].isin(kinds) & (df["run_date"] == run_date) & (df["status"] == "done")]
    if df.empty:
        return None
    return df.sort_values("started_at", kind="stable").iloc[-1].to_dict()


def mark_interrupted(ws: Workspace, message: str = "process ended without finishing (killed or crashed)") -> list[str]:
    """Mark every ``running`` row ``interrupted``; call only while holding the workspace lock (then no
    run of this workspace can still be going). Returns the run ids changed (see :func:`settle_dead_runs`)."""
    return [r["run_id"] for r in settle_dead_runs(ws, message)]


def settle_dead_runs(ws: Workspace, message: str = "process ended without finishing (killed or crashed)") -> list[dict]:
    """Mark every ``running`` row ``interrupted``, the message naming the stage it died in; call only while
    holding the workspace lock. Returns the changed rows (``run_id``, ``run_date``, ``kind``, ``stage``,
    ``flow_run_id``, ``message``)."""
    with _updating(ws):
        df = read_ledger(ws)
        hit = df["status"] == "running"
        if not hit.any():
            return []
        df["status"] = df["status"].astype(object)
        df["message"] = df["message"].astype(object)
        out = []
        for i in df.index[hit]:
            stage = df.at[i, "stage"]
            text = message + (f" during stage {stage}" if isinstance(stage, str) and stage else " before its first stage")
            df.at[i, "status"], df.at[i, "message"] = "interrupted", text
            out.append({"run_id": df.at[i, "run_id"], "run_date": df.at[i, "run_date"], "kind": df.at[i, "kind"],
                        "stage": stage, "flow_run_id": df.at[i, "flow_run_id"], "message": text})
        _write(ws, df)
    return out


def describe_interrupt(exc: BaseException) -> str | None:
    """``"SIGTERM"``-like words when ``exc`` is a stop request rather than a fault (a signal turned into
    an exception by Python or Prefect, or an exit request), else None."""
    sig = getattr(exc, "signal", None)   # prefect.exceptions.TerminationSignal carries the signal number
    if isinstance(sig, int):
        return f"stopped by {signal.Signals(sig).name}"
    if isinstance(exc, KeyboardInterrupt):
        return "stopped by SIGINT (Ctrl-C)"
    if isinstance(exc, SystemExit):
        return f"stopped by an exit request (exit code {exc.code}, e.g. from the process running it being stopped)"
    if type(exc).__name__ in ("TerminationSignal", "Abort", "CancelledError", "Cancelled"):
        return f"stopped ({type(exc).__name__})"
    return None


@dataclass
class RunRecord:
    """What one run's ledger row will say, filled in while the run goes. ``counts``: the run's counts by
    name (the ledger keeps ``rows_ingested`` and ``rows_quarantined``); ``durations``: seconds per stage."""

    kind: str
    run_date: str
    run_id: str = ""
    status: str = "running"
    version_id: str | None = None
    state: str | None = None
    message: str = ""
    counts: dict[str, int] = field(default_factory=dict)
    durations: dict[str, float] = field(default_factory=dict)
    flow_run_id: str | None = None
    inputs_key: str | None = None
    current_stage: str | None = None
    last_finished: str | None = None
    on_stage: Callable[[str], None] | None = field(default=None, repr=False, compare=False)

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        """Time the block as stage ``name`` (seconds, added up when a stage is entered twice); a stage
        that raises is timed too. The ledger row keeps the stage while it runs."""
        self.current_stage = name
        if self.on_stage is not None:
            self.on_stage(name)
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.durations[name] = round(self.durations.get(name, 0.0) + time.perf_counter() - t0, 3)
        self.last_finished = name

    def where(self) -> str:
        """``during stage X (last finished step: Y)`` for messages about a run that stopped."""
        now = f"during stage {self.current_stage}" if self.current_stage else "before its first stage"
        return now + (f" (last finished step: {self.last_finished})" if self.last_finished else "")

    def interrupt(self, what: str) -> None:
        """The run is being stopped (``what``, e.g. ``stopped by SIGTERM``): the row is finished ``interrupted``."""
        self.status, self.message = "interrupted", f"{what} {self.where()}"

    def skip(self, message: str) -> None:
        """The run ends without its work (e.g. too little data); the row is finished ``skipped``."""
        self.status, self.message = "skipped", message

    def done(self, version_id: str | None, state: str | None, message: str = "") -> None:
        """The run did its work; the row is finished ``done`` with this version and state."""
        self.status, self.version_id, self.state, self.message = "done", version_id, state, message


R = TypeVar("R", bound=RunRecord)


@contextmanager
def recorded(ws: Workspace, record: R) -> Iterator[R]:
    """Start ``record``'s ledger row, yield the record, and finish the row exactly once on exit: as the
    record says (``done`` when the block set no other status), or ``failed`` with the exception's type
    and message (then the exception propagates, KeyboardInterrupt included)."""
    record.run_id = start_run(ws, record.kind, record.run_date, flow_run_id=record.flow_run_id,
                              inputs_key=record.inputs_key)
    record.on_stage = lambda name: set_stage(ws, record.run_id, name, record.durations)
    try:
        yield record
    except BaseException as exc:
        stopped = describe_interrupt(exc)
        if record.status == "interrupted":
            pass                      # a signal handler already said what stopped it
        elif stopped:
            record.interrupt(stopped)
        else:
            where = f" (in stage {record.current_stage})" if record.current_stage else ""
            record.status, record.message = "failed", (f"{type(exc).__name__}: {exc}"[:1900] + where)
        _finish(ws, record)
        raise
    if record.status == "running":
        record.status = "done"
    _finish(ws, record)


def save(ws: Workspace, record: RunRecord) -> None:
    """Write the record's row now, as it stands (e.g. ``done`` once a night is published, before its
    report: a run killed afterwards stays done). :func:`recorded` still finishes it on exit."""
    _finish(ws, record)


def _finish(ws: Workspace, record: RunRecord) -> None:
    finish_run(ws, record.run_id, record.status, version_id=record.version_id, state=record.state,
               rows_ingested=record.counts.get("rows_ingested"),
               rows_quarantined=record.counts.get("rows_quarantined"), durations=record.durations,
               message=record.message, stage=record.current_stage, inputs_key=record.inputs_key,
               flow_run_id=record.flow_run_id)
