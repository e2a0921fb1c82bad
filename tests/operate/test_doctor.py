"""The workspace doctor (tasks/operate/doctor.py) through ``tarewise status``, and a damaged live pointer
through every command that reads it: each damage is named with its path and its fix, and no command
answers with a traceback. Real versions published under tmp_path (tests/versions_kit.py), the real CLI."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time

import pandas as pd
import pytest
from typer.testing import CliRunner
from versions_kit import publish_night

from tasks import ledger
from tasks.operate.doctor import NOTE, PROBLEM, diagnose
from tasks.publish import versions
from tasks.workspace import Workspace


@pytest.fixture
def two(tmp_path) -> tuple[Workspace, str, str, list[str]]:
    """Two published nights (the second live, based on the first), a ledger row each, and CLI arguments."""
    ws = Workspace.at(tmp_path / "ws")
    first = publish_night(ws, "2026-11-01")
    second = publish_night(ws, "2026-11-02", seed=6)
    for d, vid in (("2026-11-01", first), ("2026-11-02", second)):
        ledger.finish_run(ws, ledger.start_run(ws, "nightly", d), "done", version_id=vid, state="live")
    return ws, first, second, ["--workspace", str(ws.root)]


def _cli(*args: str):
    from flows.cli import app
    result = CliRunner().invoke(app, list(args))
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    return result


def _flat(text: str) -> str:
    return " ".join(text.split())


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_a_whole_workspace_has_no_findings(two) -> None:
    ws, _, second, args = two
    assert diagnose(ws, 3600) == []
    out = _cli("status", *args)
    assert out.exit_code == 0, out.output
    assert f"live: {second}" in out.output and "workspace check: no problems found" in out.output


@pytest.mark.parametrize("content", [b"", b"\x89garbage{", b'{"version_id": ["v1"]}'])
def test_a_damaged_live_pointer_is_named_by_every_command_that_reads_it(two, tmp_path, content: bytes) -> None:
    ws, first, second, args = two
    ws.live_pointer.write_bytes(content)
    named = f"the live pointer {ws.live_pointer} is damaged"

    status = _cli("status", *args)
    assert status.exit_code == 1
    text = _flat(status.output)
    assert "live: unknown" in text
    assert f"problem: live pointer {ws.live_pointer} is damaged" in text
    assert f"fix: `tarewise rollback --to {second}`" in text

    listing = _cli("versions", *args)
    assert listing.exit_code == 0 and named in _flat(listing.output) and first in listing.output

    pairs = tmp_path / "pairs.parquet"
    pd.DataFrame({"user_id": ["member-000001"], "item_id": ["title-000001"]}).to_parquet(pairs)
    score = _cli("score", "--pairs", str(pairs), "--out", str(tmp_path / "s.parquet"), *args)
    assert score.exit_code == 1 and named in _flat(score.output)

    prune = _cli("prune", *args)
    assert prune.exit_code == 1 and named in _flat(prune.output)

    # The fix the doctor names works, and keeps the damaged bytes.
    rollback = _cli("rollback", "--to", second, "--reason", "pointer damaged", *args)
    assert rollback.exit_code == 0, rollback.output
    assert f"live: unknown -> {second}" in rollback.output
    kept = list(ws.root.glob("live.json.damaged-*"))
    assert len(kept) == 1 and kept[0].read_bytes() == content
    assert versions.live_version(ws) == second
    assert _cli("status", *args).exit_code == 0


def test_a_pointer_to_a_missing_version_is_named(two) -> None:
    ws, first, _, args = two
    ws.live_pointer.write_text(json.dumps({"version_id": "v20261102-7", "history": []}))
    out = _cli("status", *args)
    assert out.exit_code == 1
    text = _flat(out.output)
    assert (f"problem: live pointer {ws.live_pointer} names version v20261102-7, but "
            f"{ws.versions / 'v20261102-7'} is missing") in text


@pytest.mark.parametrize("damage, says", [
    ("predictions.parquet", "predictions.parquet is missing"),
    ("model/model.pt", "model/model.pt is missing"),
    ("garble model/model.pt", "model/model.pt differs from the manifest's sha256"),
])
def test_damage_to_the_live_versions_files_is_named_with_the_fix(two, damage: str, says: str) -> None:
    ws, first, second, args = two
    path = ws.versions / second / damage.split()[-1]
    if damage.startswith("garble"):
        path.write_bytes(b"\0" * path.stat().st_size)
    else:
        path.unlink()
    out = _cli("status", *args)
    assert out.exit_code == 1 and f"live: {second}" in out.output
    assert says in _flat(out.output)
    found = diagnose(ws, 3600)
    assert [f.severity for f in found] == [PROBLEM]
    assert says in found[0].what and str(ws.versions / second) in found[0].what
    assert found[0].fix.startswith(f"`tarewise rollback --to {first}`")
    # Rolling back to the damaged version itself is refused, naming the damage.
    _cli("rollback", "--to", first, *args)
    refused = _cli("rollback", "--to", second, *args)
    assert refused.exit_code == 1 and f"version {second} is damaged" in _flat(refused.output)


def test_a_live_model_that_does_not_load_is_named(two) -> None:
    """A version from before manifests recorded files: the doctor still loads its checkpoints."""
    ws, _, second, _ = two
    manifest = ws.versions / second / "manifest.json"
    m = json.loads(manifest.read_text())
    del m["files"]
    manifest.write_text(json.dumps(m))
    (ws.versions / second / "shadow" / "meta.json").write_text('{"format": "other"}')
    found = diagnose(ws, 3600)
    assert len(found) == 1 and "shadow does not load (ValueError" in found[0].what


def test_leftovers_of_interrupted_runs_are_notes_unless_a_run_is_going(two) -> None:
    ws, _, _, args = two
    (ws.versions / ".staging-v20261103-1" / "model").mkdir(parents=True)
    (ws.versions / ".trash-v20261020-1").mkdir()
    ws.lock.write_text(json.dumps({"pid": _dead_pid(), "host": socket.gethostname(), "started": time.time(),
                                   "what": "nightly run for 2026-11-03"}))
    found = diagnose(ws, 3600)
    assert [f.severity for f in found] == [NOTE] * 3
    assert "lock file" in found[0].what and "is stale: nightly run for 2026-11-03" in found[0].what
    assert ".staging-v20261103-1 left by an interrupted run" in found[1].what
    assert ".trash-v20261020-1" in found[2].what
    out = _cli("status", *args)
    assert out.exit_code == 0 and _flat(out.output).count("note: ") == 3     # notes need nobody to act

    # A run in progress owns its staging folder: nothing to report while its holder is alive.
    ws.lock.write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "started": time.time(),
                                   "what": "nightly run for 2026-11-03"}))
    assert diagnose(ws, 3600) == []
    ws.lock.write_text("{torn")
    assert [f.what for f in diagnose(ws, 3600)][0] == f"lock file {ws.lock} is unreadable (a run died while taking it)"


def test_a_damaged_ledger_is_named_and_the_rest_is_still_shown(two) -> None:
    ws, _, second, args = two
    ws.ledger.write_bytes(b"PAR1 not really")
    out = _cli("status", *args)
    assert out.exit_code == 1
    text = _flat(out.output)
    assert f"live: {second}" in text and "runs: could not be read" in text
    assert f"problem: run ledger {ws.ledger} cannot be read" in text and f"mv {ws.ledger} {ws.ledger}.damaged" in text


def test_extra_checks_are_reported_and_a_failing_check_does_not_stop_the_others(two) -> None:
    """The hook for checks that need more than the workspace (paused deployments on a Prefect server)."""
    from tasks.operate.doctor import Finding
    ws, _, _, _ = two
    (ws.versions / ".staging-v20261103-1").mkdir()

    def paused() -> list[Finding]:
        return [Finding(PROBLEM, "deployment nightly is paused", "resume it")]

    def broken() -> list[Finding]:
        raise RuntimeError("server unreachable")

    found = diagnose(ws, 3600, extra=[paused, broken])
    assert [f.what for f in found[:2]] == ["deployment nightly is paused",
                                           "a workspace check failed: RuntimeError: server unreachable"]
    assert found[2].severity == NOTE
