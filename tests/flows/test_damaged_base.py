"""A night refuses to warm-start from a damaged live version (missing or garbled model, missing
predictions) and says so, in the run's error and in the ledger; ``tarewise run --cold`` starts from
scratch instead. Real nightly flows on the session's test API over small invented demo logs."""

from __future__ import annotations

import shutil

import pytest
from fast_config import FAST_TOML
from typer.testing import CliRunner

from tasks import ledger
from tasks.config import load_config
from tasks.publish import versions
from tasks.workspace import Workspace


@pytest.fixture(scope="module")
def one_night(prefect_harness, tmp_path_factory):
    """Two days of invented logs, a fast config, and a workspace after the first night."""
    from flows.nightly import nightly
    from tasks.operate.demo_data import generate

    root = tmp_path_factory.mktemp("damaged-base")
    generate(root / "logs", start_date="2026-11-01", days=2, n_members=300, n_titles=200, organic_per_day=500,
             seed=9, probe_share=0.1)
    (root / "fast.toml").write_text(FAST_TOML)
    cfg = load_config(root / "fast.toml", logs=str(root / "logs"), workspace=str(root / "ws"))
    assert nightly(cfg=cfg, run_date="2026-11-01")["state"] == "live"
    return root


@pytest.fixture
def copy(one_night, tmp_path):
    shutil.copytree(one_night / "ws", tmp_path / "ws")
    cfg = load_config(one_night / "fast.toml", logs=str(one_night / "logs"), workspace=str(tmp_path / "ws"))
    return cfg, Workspace.at(tmp_path / "ws"), one_night / "fast.toml"


def _damage(ws: Workspace, vid: str, what: str) -> None:
    folder = ws.versions / vid
    if what == "missing model":
        shutil.rmtree(folder / "model")
    elif what == "garbled model":
        (folder / "model" / "model.pt").write_bytes(b"\0" * (folder / "model" / "model.pt").stat().st_size)
    else:
        (folder / "predictions.parquet").unlink()


@pytest.mark.parametrize("what", ["missing model", "garbled model", "missing predictions"])
def test_a_night_refuses_a_damaged_base_and_records_why(copy, what: str) -> None:
    from flows.nightly import nightly

    cfg, ws, _ = copy
    live = versions.live_version(ws)
    _damage(ws, live, what)
    with pytest.raises(versions.BaseDamaged) as err:
        nightly(cfg=cfg, run_date="2026-11-02")
    assert f"would warm-start from version {live}, which is damaged" in str(err.value)
    assert "tarewise run --cold" in str(err.value)
    row = ledger.read_ledger(ws).iloc[-1]
    assert (row["run_date"], row["status"]) == ("2026-11-02", "failed")
    assert row["message"].startswith(f"BaseDamaged: night 2026-11-02 would warm-start from version {live}")
    assert versions.live_version(ws) == live and len(versions.list_versions(ws)) == 1   # nothing published


def test_run_cold_starts_from_scratch_past_a_damaged_base(copy) -> None:
    from flows.cli import app

    cfg, ws, toml = copy
    live = versions.live_version(ws)
    _damage(ws, live, "missing model")
    args = ["run", "--date", "2026-11-02", "--config", str(toml),
            "--logs", cfg.paths.logs, "--workspace", str(ws.root)]
    refused = CliRunner().invoke(app, args)
    assert refused.exit_code == 1
    assert "run failed: BaseDamaged: night 2026-11-02 would warm-start" in " ".join(refused.output.split())
    cold = CliRunner().invoke(app, [*args, "--cold"])
    assert cold.exit_code == 0, cold.output
    new = versions.live_version(ws)
    assert new != live and versions.read_manifest(ws, new)["base_version"] is None
    assert versions.read_manifest(ws, new)["counts"]["new_users"] == len(versions.load_checkpoint(ws, new).users)


@pytest.mark.parametrize("content", [b"", b"\x00\x00garbage"])
def test_a_run_names_a_damaged_live_pointer_and_a_cold_run_replaces_it(copy, content: bytes) -> None:
    from flows.cli import app

    cfg, ws, toml = copy
    ws.live_pointer.write_bytes(content)
    args = ["run", "--date", "2026-11-02", "--config", str(toml), "--logs", cfg.paths.logs, "--workspace", str(ws.root)]
    refused = CliRunner().invoke(app, args)
    assert refused.exit_code == 1
    text = " ".join(refused.output.split())
    assert f"run failed: PointerDamaged: the live pointer {ws.live_pointer} is damaged" in text
    assert "JSONDecodeError" not in text and "Traceback" not in text
    assert ledger.read_ledger(ws).iloc[-1]["message"].startswith(f"PointerDamaged: the live pointer {ws.live_pointer}")
    cold = CliRunner().invoke(app, [*args, "--cold"])
    assert cold.exit_code == 0, cold.output
    assert versions.read_pointer(ws)["history"][-1]["replaced_damaged_pointer"].startswith(str(ws.live_pointer))
