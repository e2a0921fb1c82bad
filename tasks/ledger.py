"""The run ledger: every nightly, backfill, rollback or sweep run with status, version, counts, durations.

Stored as one small Parquet file (schemas.LEDGER), rewritten atomically on each update: runs are few
(one or two a day), so read-modify-write is simpler and safer than appends.

A run records itself with :func:`recorded`: the row is started on entry, the run fills in a
:class:`RunRecord` (stage timings with ``record.stage(...)``, counts, version) and the row is finished
exactly once on exit: ``done``, ``skipped`` (when the run said so), or ``failed`` with the exception.
"""

from __future__ import annotations

import json
import time
import uuid
from collections.abc import Iterator
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
    return pq.read_table(ws.ledger).to_pandas()


def _write(ws: Workspace, df: pd.DataFrame) -> None:
    table = pa.Table.from_pandas(df, schema=LEDGER, preserve_index=False)
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink)
    atomic_write_bytes(ws.ledger, sink.getvalue().to_pybytes())


def _now() -> pd.Timestamp:
    return pd.Timestamp(datetime.now(timezone.utc))


def start_run(ws: Workspace, kind: str, run_date: str, message: str = "") -> str:
    run_id = uuid.uuid4().hex[:12]
    row = {c: None for c in LEDGER.names}
    row.update(run_id=run_id, kind=kind, run_date=run_date, status="running", started_at=_now(), message=message)
    df = read_ledger(ws)
    _write(ws, pd.concat([df, pd.DataFrame([row])], ignore_index=True) if len(df) else pd.DataFrame([row]))
    return run_id


def finish_run(ws: Workspace, run_id: str, status: str, *, version_id: str | None = None, state: str | None = None,
               rows_ingested: int | None = None, rows_quarantined: int | None = None,
               durations: dict | None = None, message: str = "") -> None:
    df = read_ledger(ws)
    hit = df["run_id"] == run_id
    if not hit.any():
        raise KeyError(f"run {run_id} not in ledger {ws.ledger}")
    updates = {"status": status, "version_id": version_id, "state": state, "rows_ingested": rows_ingested,
               "rows_quarantined": rows_quarantined, "finished_at": _now(),
               "durations_json": json.dumps(durations or {}, sort_keys=True), "message": message}
    for k, v in updates.items():
        df[k] = df[k].astype(object)
        df.loc[hit, k] = v
    _write(ws, df)


def latest_by_date(ws: Workspace, kinds: tuple[str, ...] = ("nightly", "backfill")) -> pd.DataFrame:
    """The latest run (by start time) of these kinds for each run date, indexed by ``run_date``."""
    df = read_ledger(ws)
    df = df[df["kind"].isin(kinds)]
    if df.empty:
        return df.set_index("run_date")
    return df.sort_values("started_at", kind="stable").groupby("run_date").tail(1).set_index("run_date").sort_index()


def mark_interrupted(ws: Workspace, message: str = "process ended without finishing (killed or crashed)") -> list[str]:
    """Mark every ``running`` row ``interrupted``; call only while holding the workspace lock (then no
    run of this workspace can still be going). Returns the run ids changed."""
    df = read_ledger(ws)
    hit = df["status"] == "running"
    if not hit.any():
        return []
    ids = df.loc[hit, "run_id"].tolist()
    df["status"] = df["status"].astype(object)
    df["message"] = df["message"].astype(object)
    df.loc[hit, "status"] = "interrupted"
    df.loc[hit, "message"] = message
    _write(ws, df)
    return ids


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

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        """Time the block as stage ``name`` (seconds, added up when a stage is entered twice); a stage
        that raises is timed too."""
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.durations[name] = round(self.durations.get(name, 0.0) + time.perf_counter() - t0, 3)

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
    record.run_id = start_run(ws, record.kind, record.run_date)
    try:
        yield record
    except BaseException as exc:
        record.status, record.message = "failed", f"{type(exc).__name__}: {exc}"[:2000]
        _finish(ws, record)
        raise
    if record.status == "running":
        record.status = "done"
    _finish(ws, record)


def _finish(ws: Workspace, record: RunRecord) -> None:
    finish_run(ws, record.run_id, record.status, version_id=record.version_id, state=record.state,
               rows_ingested=record.counts.get("rows_ingested"),
               rows_quarantined=record.counts.get("rows_quarantined"), durations=record.durations,
               message=record.message)
