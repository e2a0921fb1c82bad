"""Shared test fixtures. Everything writes real files under pytest's tmp_path."""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

# Prefect reads these at import: keep its state in a throwaway folder, quiet, and offline.
os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="tarewise-test-prefect-"))
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("DO_NOT_TRACK", "1")

import pytest  # noqa: E402

from tasks.config import Config
from tasks.workspace import Workspace


@pytest.fixture
def logs(tmp_path: Path) -> Path:
    """An empty logs folder; tests add ``dt=YYYY-MM-DD/*.parquet`` partitions to it."""
    p = tmp_path / "logs"
    p.mkdir()
    return p


@pytest.fixture
def cfg() -> Config:
    return Config()


@pytest.fixture
def ws(tmp_path: Path) -> Workspace:
    return Workspace.at(tmp_path / "ws")


REPO = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="session")
def prefect_harness():
    """One temporary Prefect API for the whole session (about 10 s to start); yields its URL so
    subprocesses (crash tests) can talk to the same API instead of starting their own."""
    from prefect.settings import PREFECT_API_URL
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        yield PREFECT_API_URL.value()


@pytest.fixture
def demo_cfg(tmp_path: Path) -> Config:
    """configs/demo.toml over the committed sample logs, with a fresh workspace."""
    from tasks.config import load_config

    return load_config(REPO / "configs" / "demo.toml", logs=str(REPO / "sample_parquet"),
                       workspace=str(tmp_path / "ws"))
