"""Task runners: the nightly flow on prefect-dask gives the same outputs as on the default thread pool.

Real Prefect flows (session harness), real Parquet logs with two files per day (so the file reads are
two parallel tasks), a real 2-worker Dask cluster on 127.0.0.1's in-process transport.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from flows import runners
from tasks.config import Config, ConfigError
from tasks.operate.demo_data import generate
from tasks.workspace import Workspace

DATES = ["2026-11-01", "2026-11-02"]


def _split_logs(logs: Path) -> None:
    """Two files per day, as log shippers write them: part-0 and part-1 hold the two halves."""
    for part in sorted(logs.glob("dt=*")):
        t = pq.read_table(part / "part-0.parquet")
        half = t.num_rows // 2
        pq.write_table(t.slice(0, half), part / "part-0.parquet")
        pq.write_table(t.slice(half), part / "part-1.parquet")


@pytest.fixture(scope="module")
def split_logs(tmp_path_factory) -> Path:
    logs = tmp_path_factory.mktemp("runner-logs") / "logs"
    # Invented demo data (tasks/operate/demo_data.py); small, but several scoring blocks under the budget below.
    generate(logs, DATES[0], days=len(DATES), n_members=600, n_titles=300, organic_per_day=3000, seed=5,
             probe_share=0.1)
    _split_logs(logs)
    return logs


def _cfg(logs: Path, ws: Path, **runtime) -> Config:
    # memory_budget_mb 0.25 -> 109 users per scoring block over 300 titles: 6 blocks, split into 3 shards.
    return Config().updated({
        "window.days": 30, "model.dim": 8, "model.max_epochs": 4, "model.finetune_epochs": 2,
        "evaluate.bootstrap": 50, "debias.memory_budget_mb": 0.25, "runtime.workers": 2,
        **{f"runtime.{k}": v for k, v in runtime.items()}}).with_overrides(logs=str(logs), workspace=str(ws))


def test_runner_choice_follows_config():
    from prefect.task_runners import ThreadPoolTaskRunner
    from prefect_dask import DaskTaskRunner

    thread = runners.task_runner(Config().runtime.model_copy(update={"workers": 3}))
    assert isinstance(thread, ThreadPoolTaskRunner) and thread._max_workers == 3
    local = runners.task_runner(Config().updated({"runtime.runner": "dask", "runtime.workers": 2}).runtime)
    assert isinstance(local, DaskTaskRunner)
    # In-process workers: process workers would each start their own temporary Prefect server in local mode.
    assert local.cluster_kwargs == {"n_workers": 2, "threads_per_worker": 1, "processes": False,
                                    "dashboard_address": None}
    remote = runners.task_runner(Config().updated({"runtime.runner": "dask",
                                                   "runtime.dask_address": "tcp://10.0.0.5:8786"}).runtime)
    assert remote.address == "tcp://10.0.0.5:8786"
    assert "tcp://10.0.0.5:8786" in runners.describe(Config().updated({"runtime.runner": "dask",
                                                                       "runtime.dask_address": "tcp://10.0.0.5:8786"}).runtime)
    with pytest.raises(ConfigError, match="runtime.runner"):
        Config().updated({"runtime.runner": "spark"})


def test_shared_cluster_only_when_needed():
    with runners.shared_cluster(Config().runtime) as address:
        assert address is None                      # thread runner: nothing to start
    remote = Config().updated({"runtime.runner": "dask", "runtime.dask_address": "tcp://10.0.0.5:8786"}).runtime
    with runners.shared_cluster(remote) as address:
        assert address is None                      # an existing cluster is used as is
    local = Config().updated({"runtime.runner": "dask", "runtime.workers": 2}).runtime
    with runners.shared_cluster(local) as address:
        assert address.startswith("inproc://")
        from distributed import Client
        with Client(address) as client:
            assert len(client.scheduler_info()["workers"]) == 2


def _finished_keys(cluster) -> list[str]:
    """Keys of the tasks the cluster's scheduler sees finish, recorded by a scheduler plugin."""
    from distributed.diagnostics.plugin import SchedulerPlugin

    class Finished(SchedulerPlugin):
        def transition(self, key, start, finish, *args, **kwargs):
            if finish == "memory":
                keys.append(str(key))

    keys: list[str] = []
    cluster.scheduler.add_plugin(Finished())
    return keys


def test_dask_runner_publishes_identical_predictions(prefect_harness, split_logs, tmp_path):
    from distributed import LocalCluster

    from flows.nightly import nightly_for

    thread_cfg = _cfg(split_logs, tmp_path / "thread")
    thread_out = [nightly_for(thread_cfg)(cfg=thread_cfg, run_date=d) for d in DATES]

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None) as cluster:
        finished = _finished_keys(cluster)
        dask_cfg = _cfg(split_logs, tmp_path / "dask", runner="dask", dask_address=cluster.scheduler_address)
        dask_out = [nightly_for(dask_cfg)(cfg=dask_cfg, run_date=d) for d in DATES]

    # What went to the cluster: per night two file reads and the scoring shards (3, see _cfg); everything
    # else runs inline in the flow. So the Dask scheduler must have seen exactly 2 * (2 + 3) tasks finish.
    names = sorted(k.rsplit("-", 1)[0] for k in finished)
    assert names == ["read_log_file"] * (2 * len(DATES)) + ["score_users"] * (3 * len(DATES))
    for a, b in zip(thread_out, dask_out):
        assert a["status"] == b["status"] == "done" and a["state"] == b["state"]
        # Compared as JSON text: a segment with one rating has NaN interval bounds, and NaN != NaN.
        assert json.dumps(a["evaluation"], sort_keys=True) == json.dumps(b["evaluation"], sort_keys=True)
        assert a["counts"] == b["counts"]
        pa_ = Workspace.at(thread_cfg.paths.workspace).versions / a["version_id"] / "predictions.parquet"
        pb_ = Workspace.at(dask_cfg.paths.workspace).versions / b["version_id"] / "predictions.parquet"
        ta, tb = pq.read_table(pa_), pq.read_table(pb_)
        assert ta.num_rows == a["counts"]["predictions"] > 0
        assert ta.equals(tb)
        assert pa_.read_bytes() == pb_.read_bytes()
    # The same day's rows went to the store from two files read in parallel, each file's rows kept in order.
    stored = pq.read_table(Workspace.at(dask_cfg.paths.workspace).store / f"dt={DATES[0]}" / "part-0.parquet")
    files = stored["input_file"].to_pylist()
    assert {Path(f).name for f in files} == {"part-0.parquet", "part-1.parquet"}


def test_cli_rejects_contradictory_runner_flags(tmp_path):
    from typer.testing import CliRunner

    from flows.cli import app

    res = CliRunner().invoke(app, ["run", "--date", DATES[0], "--workspace", str(tmp_path / "ws"),
                                   "--runner", "thread", "--dask-address", "tcp://127.0.0.1:8786"])
    assert res.exit_code == 2 and "--dask-address needs --runner dask" in res.output
    res = CliRunner().invoke(app, ["backfill", "--start", DATES[0], "--end", DATES[1],
                                   "--workspace", str(tmp_path / "ws"), "--runner", "spark"])
    assert res.exit_code == 2 and "--runner" in res.output and "'thread', 'dask'" in res.output


def test_scoring_shards_are_whole_blocks_and_change_nothing():
    """Plain functions, no Prefect: the top-N lists are the same whether users are scored in one piece or
    in shards (the parallel tasks), because shards are cut at multiples of the scoring block."""
    from synthetic import mnar_logs

    from tasks.engine.scoring import users_per_block
    from tasks.engine.trainer import fit
    from tasks.publish import predictions
    from tasks.train.settings import engine_settings

    logs = mnar_logs(n_users=400, n_items=90, seed=4)
    cfg = Config().updated({"model.dim": 4, "model.max_epochs": 2, "debias.method": "plain"})
    ckpt = fit(logs.organic, logs.probe, engine_settings(cfg)).checkpoint
    budget_mb = 0.02                                    # 29 users per block over 90 titles
    block = users_per_block(len(ckpt.items), budget_mb * 2**20)
    assert block == 29
    whole = predictions.build_predictions(ckpt, logs.organic, 10, budget_mb)
    shards = predictions.plan_shards(ckpt, logs.organic, budget_mb, shards=5)
    assert len(shards) == 5 and all(len(s.users) % block == 0 for s in shards[:-1])
    assert sum(len(s.users) for s in shards) == logs.organic["user_id"].nunique()
    assert sum(len(s.exclude_u) for s in shards) == len(logs.organic)          # every rated pair, once
    # Each shard holds exactly its own users' rated pairs, sorted by user (what top_n reads without a
    # sort); reference: the window's pairs looked up and grouped with pandas.
    pairs = pd.DataFrame({"u": ckpt.users.lookup(logs.organic["user_id"]), "i": ckpt.items.lookup(logs.organic["item_id"])})
    for s in shards:
        assert s.exclude_u.dtype == s.exclude_i.dtype == np.int32 and bool(np.all(np.diff(s.exclude_u) >= 0))
        got = pd.DataFrame({"u": s.exclude_u, "i": s.exclude_i}).sort_values(["u", "i"], ignore_index=True)
        want = pairs[pairs["u"].isin(s.users)].astype(np.int32).sort_values(["u", "i"], ignore_index=True)
        pd.testing.assert_frame_equal(got, want)
    parts = [predictions.score_shard(ckpt, s, 10, budget_mb) for s in reversed(shards)][::-1]
    pd.testing.assert_frame_equal(predictions.assemble(ckpt, parts), whole)
    # The id columns are built in Arrow from the distinct ids; the frame (and the Parquet file published
    # from it) is the one a frame of Python strings gives.
    u, i, score, rank = (np.concatenate(x) for x in zip(*parts))
    by_objects = pd.DataFrame({"user_id": ckpt.users.ids[u].to_numpy(dtype=object),
                               "item_id": ckpt.items.ids[i].to_numpy(dtype=object),
                               "score": score.astype(np.float32), "rank": rank.astype(np.int32)})
    pd.testing.assert_frame_equal(whole, by_objects)
    import pyarrow as pa
    assert pa.Table.from_pandas(whole, preserve_index=False).equals(
        pa.Table.from_pandas(by_objects, preserve_index=False), check_metadata=True)
    assert list(whole["user_id"].drop_duplicates()) == sorted(logs.organic["user_id"].unique())
