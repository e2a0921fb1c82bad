"""The run ledger: rows started and finished, and ``recorded``, which keeps one run's row and stage
timings and finishes it exactly once (done, skipped, or failed with the exception)."""

from __future__ import annotations

import json
import time
from contextlib import nullcontext

import pandas as pd
import pytest

from tasks import ledger
from tasks.ledger import RunRecord, recorded


def _only_row(ws) -> pd.Series:
    df = ledger.read_ledger(ws)
    assert len(df) == 1, df
    return df.iloc[0]


def test_row_is_running_inside_and_done_after(ws):
    with recorded(ws, RunRecord("nightly", "2026-11-02")) as run:
        assert run.run_id and _only_row(ws)["status"] == "running"
        with run.stage("ingest"):
            time.sleep(0.02)
        run.counts.update(rows_read=12, rows_ingested=10, rows_quarantined=2)
        run.done("v20261102-1", "live", message="held-out MAE 0.8 vs live 0.9: within tolerance")
    row = _only_row(ws)
    assert (row["run_id"], row["status"], row["version_id"], row["state"]) == (run.run_id, "done", "v20261102-1", "live")
    assert (row["rows_ingested"], row["rows_quarantined"]) == (10, 2)
    assert row["message"].startswith("held-out MAE") and pd.notna(row["finished_at"])
    durations = json.loads(row["durations_json"])
    assert list(durations) == ["ingest"] and 0.02 <= durations["ingest"] < 5


def test_leaving_the_block_without_a_status_is_done(ws):
    with recorded(ws, RunRecord("rollback", "2026-11-02")):
        pass
    assert _only_row(ws)["status"] == "done"


def test_skipped_run(ws):
    with recorded(ws, RunRecord("nightly", "2026-11-02")) as run:
        run.counts["rows_ingested"] = 3
        run.skip("3 ratings in the window (< runtime.min_ratings_to_train=200)")
    row = _only_row(ws)
    assert (row["status"], row["rows_ingested"]) == ("skipped", 3) and pd.isna(row["version_id"])
    assert "min_ratings_to_train" in row["message"]


@pytest.mark.parametrize("exc", [ValueError("part-0.parquet is not Parquet"), KeyboardInterrupt()],
                         ids=["error", "interrupt"])
def test_failure_is_recorded_with_the_exception_and_propagates(ws, exc):
    with pytest.raises(type(exc)):
        with recorded(ws, RunRecord("nightly", "2026-11-02")) as run:
            with run.stage("ingest"):
                pass
            with run.stage("train"):
                raise exc
    row = _only_row(ws)
    if isinstance(exc, KeyboardInterrupt):   # a stop request is recorded as what it was, not as a failure
        assert row["status"] == "interrupted"
        assert row["message"] == "stopped by SIGINT (Ctrl-C) during stage train (last finished step: ingest)"
    else:
        assert row["status"] == "failed" and row["message"].startswith(type(exc).__name__)
        assert row["message"].endswith("(in stage train)")
    assert row["stage"] == "train"
    assert set(json.loads(row["durations_json"])) == {"ingest", "train"}  # the failed stage is timed too


def test_failure_after_done_is_failed_not_done(ws):
    """The row is finished once, on exit: a step after ``done`` that raises still fails the run."""
    with pytest.raises(OSError):
        with recorded(ws, RunRecord("nightly", "2026-11-02")) as run:
            run.done("v20261102-1", "live")
            raise OSError("artifact upload failed")
    row = _only_row(ws)
    assert row["status"] == "failed" and row["message"] == "OSError: artifact upload failed"


def test_stage_entered_twice_adds_up(ws):
    run = RunRecord("nightly", "2026-11-02")
    for _ in range(2):
        with run.stage("report"):
            time.sleep(0.01)
    assert run.durations["report"] >= 0.02


def test_each_run_gets_its_own_row_and_latest_by_date(ws):
    for status in ("failed", "done"):
        with pytest.raises(RuntimeError) if status == "failed" else nullcontext():
            with recorded(ws, RunRecord("nightly", "2026-11-02")):
                if status == "failed":
                    raise RuntimeError("first try")
    df = ledger.read_ledger(ws)
    assert df["status"].tolist() == ["failed", "done"] and df["run_id"].nunique() == 2
    assert ledger.latest_by_date(ws).loc["2026-11-02", "status"] == "done"


def test_mark_interrupted_changes_only_running_rows(ws):
    rid = ledger.start_run(ws, "nightly", "2026-11-01")
    with recorded(ws, RunRecord("nightly", "2026-11-02")):
        pass
    assert ledger.mark_interrupted(ws) == [rid]
    assert ledger.read_ledger(ws)["status"].tolist() == ["interrupted", "done"]
    assert ledger.mark_interrupted(ws) == []



def test_running_row_keeps_its_stage_so_a_dead_run_is_named_by_stage(ws):
    """A run killed outright never finishes its row; the stage it was in is already in the ledger, and the
    next run (holding the lock) settles it as interrupted in that stage, with its Prefect flow run id."""
    rec = RunRecord("nightly", "2026-11-02", flow_run_id="0c6b5d1e-flow")
    ctx = recorded(ws, rec)
    run = ctx.__enter__()          # never exited: as after a SIGKILL
    with run.stage("ingest"):
        pass
    with run.stage("train"):
        row = _only_row(ws)
        assert (row["status"], row["stage"], row["flow_run_id"]) == ("running", "train", "0c6b5d1e-flow")
    dead = ledger.settle_dead_runs(ws)
    assert [(d["run_date"], d["stage"], d["flow_run_id"]) for d in dead] == [("2026-11-02", "train", "0c6b5d1e-flow")]
    row = _only_row(ws)
    assert row["status"] == "interrupted" and row["message"].endswith("during stage train")


def test_refused_rows_do_not_hide_a_done_night(ws):
    with recorded(ws, RunRecord("nightly", "2026-11-02")) as run:
        run.done("v20261102-1", "live")
    ledger.record_refusal(ws, "backfill", "2026-11-02", "workspace lock still held after 5 s")
    assert ledger.latest_by_date(ws).loc["2026-11-02", "status"] == "done"
    assert ledger.read_ledger(ws)["status"].tolist() == ["done", "refused"]
