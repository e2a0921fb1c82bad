"""End to end: the real nightly Prefect flow over the committed demo logs (real Parquet, real torch)."""

from __future__ import annotations

import json
import shutil
import time

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from tasks.ingest.store import read_window
from conftest import REPO
from tasks import ledger
from tasks.ledger import read_ledger
from tasks.publish import versions
from tasks.workspace import Workspace

DATES = ["2026-11-01", "2026-11-02", "2026-11-03"]


@pytest.fixture(scope="module")
def three_nights(prefect_harness, tmp_path_factory):
    """Run the demo config for three consecutive nights once; several tests read the result."""
    from flows.nightly import nightly
    from tasks.config import load_config
    from conftest import REPO

    root = tmp_path_factory.mktemp("three")
    cfg = load_config(REPO / "configs" / "demo.toml", logs=str(REPO / "sample_parquet"), workspace=str(root / "ws"))
    outs = [nightly(cfg=cfg, run_date=d) for d in DATES]
    return cfg, outs


def test_three_nights_publish_three_versions_with_sane_outputs(three_nights):
    cfg, outs = three_nights
    ws = Workspace.at(cfg.paths.workspace)
    listed = versions.list_versions(ws)
    assert [m["run_date"] for m in listed] == DATES
    assert sum(m["state"] == "live" for m in listed) == 1
    for out, m in zip(outs, listed):
        assert out["status"] == "done" and out["version_id"] == m["version_id"]
        for key in ("run_date", "data_window", "input_files", "config_hash", "code_version", "metrics", "gate"):
            assert key in m, key
        assert all(f["size"] > 0 and len(f["sha256"]) == 64 for f in m["input_files"])
        cand = m["metrics"]["candidate"]
        assert cand["n"] > 0 and 0 < cand["mae"] < 2.0 and cand["mae_lo"] <= cand["mae"] <= cand["mae_hi"]
        preds = pq.read_table(ws.versions / m["version_id"] / "predictions.parquet").to_pandas()
        assert preds["score"].between(cfg.scale.min, cfg.scale.max).all()
        assert preds.groupby("user_id")["rank"].max().max() == cfg.publish.top_n
        assert not preds.duplicated(["user_id", "item_id"]).any()
        # never recommend what the user already rated in the window
        window = read_window(ws, m["run_date"], cfg.window.days)
        rated = set(zip(window["user_id"], window["item_id"]))
        assert not any(p in rated for p in zip(preds["user_id"], preds["item_id"]))
        assert (ws.reports / f"{m['run_date']}.html").exists()
    ledger = read_ledger(ws)
    assert list(ledger["status"]) == ["done"] * 3
    # one row per night, with the version, the gate's reason and every stage's time, as the flow returned
    for out, (_, row) in zip(outs, ledger.iterrows()):
        assert (row["version_id"], row["state"], row["message"]) == (out["version_id"], out["state"], out["message"])
        assert row["message"] == out["gate"]["reason"] and row["rows_ingested"] == out["counts"]["rows_ingested"]
        assert json.loads(row["durations_json"]) == out["durations"]
        # the report stage starts before the gate (tonight's metrics and alerts) and ends after publishing
        assert list(out["durations"]) == ["ingest", "window", "train", "evaluate", "anchor", "report", "predict",
                                         "publish"]


def test_debiased_candidate_beats_plain_shadow_on_demo(three_nights):
    """The demo logs are built with lover/hater selection skew (tasks/operate/demo_data.py): the debiased
    candidate must beat the plain shadow on held-out probe MAE, summed over the three nights."""
    _, outs = three_nights
    cand = np.mean([o["evaluation"]["candidate"]["mae"] for o in outs])
    shadow = np.mean([o["evaluation"]["shadow"]["mae"] for o in outs])
    assert cand < shadow, (cand, shadow)


def test_rerun_same_date_gives_identical_predictions_and_no_duplicate_rows(prefect_harness, demo_cfg):
    from flows.nightly import nightly

    ws = Workspace.at(demo_cfg.paths.workspace)
    nightly(cfg=demo_cfg, run_date=DATES[0])
    first = nightly(cfg=demo_cfg, run_date=DATES[1])
    rows_before = len(read_window(ws, DATES[1], demo_cfg.window.days))
    live_before, ledger_rows = versions.live_version(ws), len(ledger.read_ledger(ws))
    # Triggered again with the same inputs: nothing runs, one line says so, no ledger row, live unchanged.
    again = nightly(cfg=demo_cfg, run_date=DATES[1])
    assert again["status"] == "unchanged" and again["version_id"] == first["version_id"]
    assert "already done with the same inputs" in again["message"] and "--force" in again["message"]
    assert len(ledger.read_ledger(ws)) == ledger_rows and versions.live_version(ws) == live_before
    second = nightly(cfg=demo_cfg, run_date=DATES[1], force=True)
    assert first["version_id"] != second["version_id"]
    a = pq.read_table(ws.versions / first["version_id"] / "predictions.parquet").to_pandas()
    b = pq.read_table(ws.versions / second["version_id"] / "predictions.parquet").to_pandas()
    pd.testing.assert_frame_equal(a, b)
    assert len(read_window(ws, DATES[1], demo_cfg.window.days)) == rows_before
    stored = pq.read_table(ws.store).to_pandas()
    assert not stored.duplicated(["user_id", "item_id", "source", "event_time"]).any()


def test_changed_inputs_rerun_a_done_night(prefect_harness, demo_cfg, tmp_path):
    """The same date triggered again after its input file changed (a corrected upload) runs again."""
    from flows.nightly import nightly

    logs = tmp_path / "logs"
    _copy_logs(REPO / "sample_parquet", logs, DATES[:1])
    cfg = demo_cfg.with_overrides(logs=str(logs))
    first = nightly(cfg=cfg, run_date=DATES[0])
    part = next((logs / f"dt={DATES[0]}").glob("*.parquet"))
    df = pd.read_parquet(part)
    df.iloc[: len(df) - 1].to_parquet(part, index=False)     # one row fewer
    second = nightly(cfg=cfg, run_date=DATES[0])
    assert second["status"] == "done" and second["version_id"] != first["version_id"]
    assert second["counts"]["rows_read"] == first["counts"]["rows_read"] - 1


def _copy_logs(src, dst, dates):
    for d in dates:
        shutil.copytree(src / f"dt={d}", dst / f"dt={d}")


def test_corrupt_file_fails_run_names_file_and_keeps_live(prefect_harness, demo_cfg, tmp_path):
    from flows.nightly import nightly
    from conftest import REPO

    logs = tmp_path / "logs"
    _copy_logs(REPO / "sample_parquet", logs, DATES[:2])
    cfg = demo_cfg.with_overrides(logs=str(logs))
    ws = Workspace.at(cfg.paths.workspace)
    nightly(cfg=cfg, run_date=DATES[0])
    live = versions.live_version(ws)
    bad = logs / f"dt={DATES[1]}" / "part-0.parquet"
    bad.write_bytes(bad.read_bytes()[:200])  # truncated Parquet
    with pytest.raises(Exception) as info:
        nightly(cfg=cfg, run_date=DATES[1])
    assert "part-0.parquet" in str(info.value)
    assert versions.live_version(ws) == live
    assert versions.load_checkpoint(ws, live) is not None
    assert read_ledger(ws)["status"].tolist() == ["done", "failed"]


def test_too_many_rejected_rows_fails_before_training_and_quarantines(prefect_harness, demo_cfg, tmp_path):
    from flows.nightly import nightly
    from conftest import REPO

    logs = tmp_path / "logs"
    _copy_logs(REPO / "sample_parquet", logs, DATES[:1])
    part = logs / f"dt={DATES[0]}" / "part-0.parquet"
    df = pq.read_table(part).to_pandas()
    df.loc[: len(df) // 5, "rating"] = 9.0  # a fifth of the rows off the 1..5 scale
    df.to_parquet(part, index=False)
    cfg = demo_cfg.with_overrides(logs=str(logs))
    ws = Workspace.at(cfg.paths.workspace)
    with pytest.raises(Exception, match="rejected"):
        nightly(cfg=cfg, run_date=DATES[0])
    q = pq.read_table(ws.quarantine).to_pandas()
    assert len(q) == len(df.loc[: len(df) // 5]) and q["reason"].str.contains("scale").all()
    assert versions.live_version(ws) is None and not list(ws.versions.glob("v*"))


def test_run_refused_while_another_holds_the_lock(prefect_harness, demo_cfg):
    from flows.nightly import nightly
    from tasks.lock import LockWaitExpired, workspace_lock

    ws = Workspace.at(demo_cfg.paths.workspace)
    cfg = demo_cfg.updated({"runtime.lock_wait_seconds": 2})
    t0 = time.monotonic()
    with workspace_lock(ws.lock, "a manual run", 3600):
        with pytest.raises(LockWaitExpired, match="gave up after waiting 2 s .*locked by a manual run"):
            nightly(cfg=cfg, run_date=DATES[0])
    assert time.monotonic() - t0 >= 2            # it waited the stated time first
    assert versions.live_version(ws) is None
    row = read_ledger(ws).iloc[-1]                # the refusal is in the ledger, not only in Prefect
    assert (row["status"], row["run_date"], row["kind"]) == ("refused", DATES[0], "nightly")
    assert "runtime.lock_wait_seconds" in row["message"] and row["flow_run_id"]


def test_nightly_waits_for_a_backfill_holding_the_lock_then_runs(prefect_harness, demo_cfg):
    """A nightly started while another run holds the lock waits for it instead of failing."""
    import threading

    from flows.nightly import nightly
    from tasks.lock import workspace_lock

    ws = Workspace.at(demo_cfg.paths.workspace)
    cfg = demo_cfg.updated({"runtime.lock_wait_seconds": 120})
    held, release = threading.Event(), threading.Event()

    def holder():
        with workspace_lock(ws.lock, "backfill 2026-10-01..2026-10-31", 3600):
            held.set()
            release.wait(60)

    t = threading.Thread(target=holder)
    t.start()
    held.wait(10)
    threading.Timer(3.0, release.set).start()
    t0 = time.monotonic()
    out = nightly(cfg=cfg, run_date=DATES[0])
    t.join()
    assert out["status"] == "done" and time.monotonic() - t0 >= 3
