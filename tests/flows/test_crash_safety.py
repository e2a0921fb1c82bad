"""A run killed with SIGKILL while publishing leaves the previous live version intact and readable,
and the next run succeeds. The kill is real: the CLI runs in a subprocess that SIGKILLs itself at a
named point (tasks/failpoints.py)."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys

import pandas as pd
import pytest

from handmade import promote_all_demo_config
from tasks.publish import versions
from tasks.publish.scoring_io import score_pairs
from tasks.workspace import Workspace


def _cli(args, env_extra, api_url):
    from conftest import REPO

    env = dict(os.environ, PREFECT_API_URL=api_url, **env_extra)
    return subprocess.run([sys.executable, "-m", "flows.cli", *args], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=600)


@pytest.fixture(scope="module")
def one_night_workspace(prefect_harness, tmp_path_factory):
    """A workspace after one good night (in-process); each crash case works on a copy of it."""
    from flows.nightly import nightly
    from tasks.config import load_config
    from conftest import REPO

    base = tmp_path_factory.mktemp("crash-base")
    root = base / "ws"
    config = promote_all_demo_config(base)
    cfg = load_config(config, logs=str(REPO / "sample_parquet"), workspace=str(root))
    nightly(cfg=cfg, run_date="2026-11-01")
    return root, config


@pytest.mark.parametrize("point", ["publish:staged", "publish:renamed", "live:before-switch"])
def test_sigkill_during_publish_keeps_live_and_next_run_succeeds(prefect_harness, one_night_workspace, tmp_path,
                                                                  point):
    from flows.nightly import nightly
    from tasks.config import load_config
    from conftest import REPO

    base, config = one_night_workspace
    demo_cfg = load_config(config, logs=str(REPO / "sample_parquet"), workspace=str(tmp_path / "ws"))
    shutil.copytree(base, demo_cfg.paths.workspace, dirs_exist_ok=True)
    ws = Workspace.at(demo_cfg.paths.workspace)
    live = versions.live_version(ws)
    assert live is not None
    common = ["--config", str(config), "--logs", str(REPO / "sample_parquet"),
              "--workspace", str(ws.root)]
    killed = _cli(["run", "--date", "2026-11-02", *common], {"TAREWISE_FAILPOINT": point}, prefect_harness)
    assert killed.returncode == -signal.SIGKILL, (killed.returncode, killed.stderr[-2000:])
    assert ws.lock.exists()  # the dead run's lock is left behind, as after a real crash

    # The previous live version is still live and still scores.
    assert versions.live_version(ws) == live
    pairs = tmp_path / "pairs.parquet"
    pd.DataFrame({"user_id": ["member-000001", "member-999999"], "item_id": ["title-000001"] * 2}).to_parquet(pairs)
    n, used, _ = score_pairs(demo_cfg, pairs, tmp_path / "scored.parquet")
    assert (n, used) == (2, live)

    # The next run takes over the dead run's lock, cleans up, and publishes.
    out = nightly(cfg=demo_cfg, run_date="2026-11-02")
    assert out["status"] == "done"
    assert not list(ws.versions.glob(".staging-*"))
    states = {m["version_id"]: m["state"] for m in versions.list_versions(ws)}
    assert sum(s == "live" for s in states.values()) == 1
